"""``python -m crustflow``: the same as the ``crustflow`` command."""

import sys

from crustflow.cli import main

sys.exit(main())
