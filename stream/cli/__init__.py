"""The command line: `main`, one module per subcommand, and the demo workflow."""
