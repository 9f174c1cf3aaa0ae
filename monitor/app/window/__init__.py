"""The desktop window's side of the app: the controller, its jobs, rig sessions, pages and the window's sides.

Rule: the only part of monitor.app that imports Qt (with the `window` and
`demo` commands); what it computes comes from core, what it stores goes
through monitor.store, what it shows is a view model of monitor.ui.models.
"""
