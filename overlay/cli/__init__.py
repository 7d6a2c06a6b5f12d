"""The command line: one module per command, shared error handling in main."""
