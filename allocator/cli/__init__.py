"""The command line: click commands only; every number comes from the library."""
