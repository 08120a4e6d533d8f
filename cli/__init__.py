"""The ``buswitness`` command line: argument parsing and orchestration only."""
