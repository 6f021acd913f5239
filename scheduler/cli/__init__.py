"""The command line: thin (parse, call the core, print)."""
