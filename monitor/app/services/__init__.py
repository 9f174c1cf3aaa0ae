"""What the command line and the window both do with the store: animal records, assignment, blinding, effects.

Rule: nothing here imports Qt; each function takes an open connection or a
path and returns plain values, so a command and a window side share it.
"""
