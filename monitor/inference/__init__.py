"""How features become probabilities: the runners and the unfamiliar-sound profiles.

Owns: `base` (the `Runner` contract, `RunnerBase`, `softmax`, `file_sha256`), `runners`
(Keras and LiteRT), `micro` (the microcontroller interpreter), `onnx` (ONNX Runtime),
`registry` (`load_runner`:
which runner for which file) and `novelty` (the feature profile and the Mahalanobis
distance per window).
May import: ``monitor.base``, ``monitor.sound``, ``monitor.features``.
"""
