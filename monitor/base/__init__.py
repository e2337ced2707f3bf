"""The foundation every other subpackage stands on.

Owns: `errors` (`ScenemonError` and its kinds, exit codes), `files` (atomic writes, strict
JSON, regular-file reads, sha256 fingerprints, segment names, the session lock), `native`
(calls into C libraries: glibc's allocator, libsndfile's header update, quieting native
chatter), `palette` (the colours the UI and the HTML report share) and `records` (`record`,
a dataclass whose methods are shared rather than generated, for quick start-up).
May import: nothing of scenemon.
"""
