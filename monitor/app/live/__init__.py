"""The live path: a reader's batches fanned out to the store and the engine; snapshots turned into view states.

Rule: nothing here imports Qt; the engine runs in its own thread and publishes
immutable snapshots, the views are pure functions of them.
"""
