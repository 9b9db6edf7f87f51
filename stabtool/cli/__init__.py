"""Command-line interface: ``stabtool COMMAND ...``."""
