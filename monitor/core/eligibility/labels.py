"""What each eligibility figure means, in words a person reads beside the number.

Rule: one definition per figure, with its unit, used wherever a person reads
it (the window, the report, the logs); plain data, so the window may import it
without the rules' file parsing.
"""

LABELS = {      # one definition per figure, with its unit, wherever a person reads it (window, report, logs)
    "sessions_since_plateau": "Sessions since plateau (included sessions after the plateau session)",
    "trials_since_plateau": "Trials since plateau (completed trials of those sessions)",
    "interval_error": "Interval error, median |ln(interval ÷ target)| (latest session; 0 is on target)",
    "cv": "CV of intervals, SD ÷ mean (latest session)",
}
