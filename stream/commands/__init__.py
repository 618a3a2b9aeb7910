"""One module per ``ranktide`` subcommand (see :mod:`stream.cli`)."""
