"""The terminal UI (textual): live view, stage view, relabel view.

Owns: `app` (the app, its layout and the relabel run), `bridge` (engine to UI messages),
`draw` (pure functions from state to Rich text), `screens/`.
May import: the flow below (base to assembly); not the other tools (review, device, demo).
"""
