"""The demo scenario: a wearable that adapts to four places.

`synth` makes seeded procedural audio of each place, `tour` a seeded walk through them with
its truth, and `build` trains the small demo model deterministically.
"""

CLASSES = ("quiet_room", "voices", "traffic", "machinery")
SAMPLE_RATE = 16000
