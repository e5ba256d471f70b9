"""The exit codes every command shares (this module imports nothing, so the entry point can use it first).

0 all done; 1 done but some inputs were skipped; 2 usage error or nothing could be
done; 3 an acceptance gate failed.
"""

__all__ = ["EXIT_OK", "EXIT_SKIPPED", "EXIT_USAGE", "EXIT_GATE"]

EXIT_OK, EXIT_SKIPPED, EXIT_USAGE, EXIT_GATE = 0, 1, 2, 3
