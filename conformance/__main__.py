"""``python -m convwitness ...`` is the ``convwitness`` command."""
from .cli.main import main

main()
