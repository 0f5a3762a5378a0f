"""``python -m lodeline`` is the ``lodeline`` command."""

import sys

from .cli import main

sys.exit(main())
