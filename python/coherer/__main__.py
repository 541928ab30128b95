# SPDX-License-Identifier: GPL-3.0-or-later
"""``python -m gnuradio.coherer``: the ``coherer`` command."""

import sys

from .cli import main

sys.exit(main())
