"""Names the dead-code check (tests/test_dead_code.py) accepts although nothing in the program uses them.

Rule: a name belongs here only when something outside our code uses it, or
when it is a field of a record that is read by name when the record is
written out; the third section lists names still waiting to be wired into
the program or removed, so that the check fails on any new dead code meanwhile.
This file is vulture's whitelist format: each line "uses" the name once.
"""
_ = object()

# -- used by a framework: numpy array flags, Qt overrides, signal handler arguments
_.writeable
down_revision  # monitor/store/lab_migrations: Alembic reads a revision file's module variables
branch_labels
depends_on
_.itersize  # monitor/store/lab_read.py: psycopg's server-side cursor reads it
CTRL_C_EVENT  # monitor/app/stopping.py: the table of wincon.h's console events, read whole
CTRL_BREAK_EVENT
_.sizeHint
signum

# -- fields of records written out whole (JSON reports, exports, status views, plain())
other_lines
last_notice
today_outside
rolling_hits
rolling_median_ms
p_mode
p_low
p_high
detected_at
date_of_birth
minimum_rule  # monitor/core/care/ledger.py DaySummary: shown whole in the care window
x_low  # monitor/core/effects/cohort.py Point: the trend's points, passed whole
x_high
y_low
y_high
strain
genotype
median_abs_error
after_miss
after_hit
difference
correction_slope

# -- still to wire into the program or remove
head_revision  # monitor/store/lab_schema.py: Alembic's own head, checked against HEAD by the tests
_._bits  # drivers/clock.py
_.failure  # drivers/serial.py, drivers/tail.py
_.opened_path  # drivers/serial.py
_.alive  # drivers/serial.py, drivers/tail.py
_.segments  # drivers/mapping.py
OUTCOME_WORDS  # drivers/wire.py
_.lines_dropped  # mock_rig/outputs.py
_.lines_written  # mock_rig/outputs.py
_.backlog_bytes  # mock_rig/outputs.py
_.inject  # mock_rig/live.py
classic_params  # mock_rig/learner.py (the simulator's documented classic mode)
_.classic_trial  # mock_rig/learner.py
_.batches  # monitor/app/live/engine.py
_.titles  # monitor/app/window/jobs.py (the tests wait for the jobs to end)
_.notifier  # monitor/ui/main_window.py
scheme  # monitor/ui/main_window.py
_.static_builds  # monitor/ui/tile.py
_.select  # monitor/ui/alerts.py
_.select_session  # monitor/ui/animal_page.py
_.worst_open  # monitor/ui/owners.py
axis_label  # monitor/ui/plots.py
outcome_sensitivity  # monitor/core/consolidation/measures.py
session_summaries  # monitor/core/consolidation/measures.py
_.end_fraction  # monitor/core/consolidation/model.py
_.start_params  # benchmarks/bench_refit.py
_.from_payload  # monitor/core/eligibility/decision_log.py (documented for auditors)
rebuild_missing  # monitor/store/derive.py
SCHEMA_VERSION  # monitor/store/schema.py
last_commit_at  # monitor/store/writer.py
