"""How probabilities become decisions, and what a decided window is.

Owns: `decide` (smoothing and the hysteresis state machine), `tally` (running counts,
confusion, accuracy, latency, level stretches) and `contract` (the observer contract:
`WindowResult`, `EngineStatus`, `Observer`, `ObserverBase`, `Source`).
May import: ``monitor.base``, ``monitor.sound``, ``monitor.features``, ``monitor.inference``.
"""
