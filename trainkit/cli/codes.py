"""The exit codes every command shares (this module imports nothing, so the entry point can use it first).

0 all done; 1 done but some inputs were skipped; 2 usage error or nothing could be
done; 3 an acceptance gate failed; 70 the kit crashed (a bug: the traceback is shown;
70 is EX_SOFTWARE, "internal software error", of the BSD sysexits.h convention);
130 interrupted by Ctrl-C (finished work is kept; 128 + SIGINT, the shells' convention).
"""

__all__ = [
    "EXIT_OK",
    "EXIT_SKIPPED",
    "EXIT_USAGE",
    "EXIT_GATE",
    "EXIT_CRASH",
    "EXIT_INTERRUPTED",
    "EXIT_CODES",
]

EXIT_OK, EXIT_SKIPPED, EXIT_USAGE, EXIT_GATE = 0, 1, 2, 3
EXIT_CRASH = 70
EXIT_INTERRUPTED = 130

#: Every exit code with what it means, for help texts and documentation.
EXIT_CODES = {
    EXIT_OK: "all done",
    EXIT_SKIPPED: "done, but some inputs were skipped (each named on stderr)",
    EXIT_USAGE: "usage error or nothing could be done",
    EXIT_GATE: "an acceptance gate failed",
    EXIT_CRASH: "trainkit crashed: a bug, shown with its traceback",
    EXIT_INTERRUPTED: "interrupted (Ctrl-C); finished work is kept",
}
