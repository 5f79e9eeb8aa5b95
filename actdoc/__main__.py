"""Run actdoc as ``python -m actdoc``."""

import sys

from actdoc.cli import main

sys.exit(main())
