# SPDX-License-Identifier: GPL-3.0-or-later
"""Test set-up: import gr-coherer from the source tree (or the installed copy with
COHERER_TEST_INSTALLED=1) and provide a flowgraph fixture that always stops."""

import os
import pathlib

import gnuradio

REPO = pathlib.Path(__file__).resolve().parents[1]
if not os.environ.get("COHERER_TEST_INSTALLED"):
    gnuradio.__path__.insert(0, str(REPO / "python"))

import pytest  # noqa: E402
from gnuradio import gr  # noqa: E402


@pytest.fixture
def tb():
    """A top block that is stopped and waited for even when the test fails."""
    top = gr.top_block()
    yield top
    top.stop()
    top.wait()
