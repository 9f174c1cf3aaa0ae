"""The analysis core: pure functions and small state machines over plain values (numpy and scipy only).

Rule: nothing here opens a file, a port, a database, a thread or a window;
protocol.py and alerts.py serve every area, session/ holds one session's
figures and the animal report, and consolidation/, eligibility/ and care/
use session/ but not each other (the import contracts in pyproject.toml).
"""
