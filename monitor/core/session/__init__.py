"""One session's trials and statistics, summaries across sessions, the plateau rules and the animal report."""
