"""Options shared by several commands (no heavy imports: parsing stays fast)."""


def add_tolerance_arguments(p):
    """``--tol`` as used by diff, run --baseline and batch."""
    p.add_argument("--tol", action="append", default=[], metavar="[COLUMN=]VALUE",
                   help="absolute tolerance (default 1e-9); COLUMN=VALUE for one column or a "
                        "pattern; heading columns in rad or '0.1 deg'; repeatable, the last match wins")
