"""The settings of a check: their declaration, the project configuration, report paths and the command-line options derived from them."""
