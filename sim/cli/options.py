"""Options shared by several commands (no heavy imports: parsing stays fast)."""


def add_tolerance_arguments(p):
    """``--tol`` as used by diff, run --baseline and batch."""
    p.add_argument("--tol", action="append", default=[], metavar="[COLUMN=]VALUE",
                   help="absolute tolerance (default 1e-9); COLUMN=VALUE for one column or a "
                        "pattern; heading columns in rad or '0.1 deg'; repeatable, the last match wins")


def print_warnings(*sources) -> None:
    """Print the plausibility warnings of robots and scenarios (their ``warnings``) to stderr, each once."""
    import sys
    seen = set()
    for src in sources:
        for w in getattr(src, "warnings", ()) or ():
            if w not in seen:
                seen.add(w)
                print(w, file=sys.stderr)
