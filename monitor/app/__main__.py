"""`python -m monitor.app` runs the same command line as `rigside`."""

from monitor.app.cli import main

raise SystemExit(main())
