"""The composition root: one place turns a plan into a running chain.

Owns: `plan` (what a command asks for, as frozen data), `engine` (the compute thread:
windows, features, probabilities, decisions, published to observers), `observers` (the
printing observers and the collector), `assemble` (`run_session`, `load_model`,
`replay_file`, `file_windows`), `run` (a session run from the command line and its
closing summary) and `field` (an unattended run: sessions one after another in a run folder).
May import: every subpackage of the flow below it (base, sound, features, inference,
decisions, session).
"""
