"""The command line: thin modules that parse arguments and call the library."""
