"""The ``convwitness`` command line: ``main.py`` parses and dispatches every command;
``commands.py`` holds the output commands (diff, merge, generate) and sharding options."""
