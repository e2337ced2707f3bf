"""What a session is on disk: its files, their one owner each, and what fills them.

Owns: `truth` (truth files and the live truth), `clock` (the clocks a session records),
`snippets` (snippet files and sidecars), `capture` (when a snippet is taken), `writer`
(every file of a session, on its own thread), `reader` (`load_session`), `repair`
(``scenemon repair``) and `runfolder` (a field run's folder: its sessions in order, log,
status file and disk budget).
May import: ``monitor.base``, ``monitor.sound``, ``monitor.features``,
``monitor.inference``, ``monitor.decisions``.
"""
