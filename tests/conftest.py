"""Test-wide settings: Prefect runs quietly in a temporary home of its own."""

import os
import tempfile

from tamis.cli import PREFECT_DEFAULTS

os.environ.setdefault("PREFECT_HOME", tempfile.mkdtemp(prefix="tamis-prefect-"))
for _name, _value in PREFECT_DEFAULTS.items():
    os.environ.setdefault(_name, _value)
