"""The stage view in a browser: a small HTTP server inside the session process.

Owns: `feed` (`StageFeed`, the engine observer that turns each window into a small message
for the browsers, and `window_message`), `server` (`StageServer`: the tokens, the pages, the
server-sent event stream, the presenter's truth and capture requests, on a thread of its own
with its own event loop) and `page/` (the HTML, CSS and JavaScript it serves; nothing is
fetched from elsewhere).
May import: every subpackage of the flow up to the composition root (base, sound, features,
inference, decisions, session, assembly); none of the other tools (ui, review, device, demo).
"""
