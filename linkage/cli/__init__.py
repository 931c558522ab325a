"""The command line: thin, one module a command; it parses and calls the library."""
