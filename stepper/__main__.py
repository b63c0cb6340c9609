"""Allow ``python -m stepper``."""

from stepper.cli import main

raise SystemExit(main())
