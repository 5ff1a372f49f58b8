import sys
from pathlib import Path

# make tests/helpers.py importable as `helpers`
sys.path.insert(0, str(Path(__file__).parent))
