"""The command-line interface: a thin shell over the library."""
