"""One module per command: each builds a plan from library calls and runs it (or prints it)."""
