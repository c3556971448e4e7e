"""The command line: ``main(argv) -> exit code``; one module ``cmd_NAME`` per subcommand."""
from sim.cli.app import main

__all__ = ["main"]
