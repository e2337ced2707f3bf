"""After a session: metrics, the report (terminal and HTML), the tuning sweep, the harvest.

Owns: `metrics`, `report`, `runreport` (a field run folder's account), `tune`, `harvest` and
`score` (many recordings at once).
May import: the flow below (base to assembly); not the other tools (device, demo, ui).
"""
