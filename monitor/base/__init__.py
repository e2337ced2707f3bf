"""The foundation every other subpackage stands on.

Owns: `errors` (`ScenemonError` and its kinds, exit codes), `files` (atomic writes, strict
JSON, regular-file reads, sha256 fingerprints, segment names, the session lock), `native`
(calls into C libraries: glibc's allocator, libsndfile's header update, quieting native
chatter) and `palette` (the colours the UI and the HTML report share).
May import: nothing of scenemon.
"""
