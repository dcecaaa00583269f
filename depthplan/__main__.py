"""`python -m depthplan`: the same as the `depthplan` command."""
from .cli import main

raise SystemExit(main())
