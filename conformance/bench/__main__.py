"""``python -m convwitness.bench [reference|isolation|harness|all]``: measured figures, never tests."""
from .main import main

main()
