"""Shared test setup: make the reference helpers in tests/references.py importable
whatever pytest's import mode."""

import sys
from pathlib import Path

sys.path.insert(0, str(Path(__file__).parent))
