"""After a session: metrics, the report (terminal and HTML), the tuning sweep, the harvest."""
