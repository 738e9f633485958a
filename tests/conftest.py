import sys
from pathlib import Path

# Shared closed-form lenses (tests/closed_form.py) are imported by several test modules.
sys.path.insert(0, str(Path(__file__).parent))
