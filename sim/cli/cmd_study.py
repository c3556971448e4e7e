"""``trundle study STUDY.yaml``: vary a base's numbers over routes and scenarios, one row per variant."""
from __future__ import annotations

import sys

NAME = "study"
HELP = "design study: vary a base's dimensions and limits, measure each variant on routes and scenarios"


def add_arguments(p):
    p.add_argument("study", help="study file (YAML; README 'Design studies')")
    p.add_argument("-o", "--output", metavar="RESULTS", help="write the table (.parquet or .csv), one row per variant")
    p.add_argument("--jobs", type=int, default=None, metavar="N",
                   help="worker processes (default: all cores; 1 runs in this process)")
    p.add_argument("--scheduler", metavar="ADDRESS",
                   help="run the variants on a Dask scheduler (e.g. tcp://10.0.0.5:8786; extra [cluster])")
    p.add_argument("--plot", metavar="PNG", help="draw the Pareto front and one-parameter sensitivity plots")
    p.add_argument("--sort", metavar="FIGURE", help="sort the table by this figure (default: the first one)")
    p.add_argument("--pareto", metavar="FIG_A,FIG_B",
                   help="the two figures to trade off (default: the first two)")
    p.add_argument("--cache", metavar="FILE",
                   help="cache file (default: RESULTS.cache.json beside -o, else STUDY.cache.json)")
    p.add_argument("--no-cache", action="store_true", help="run every variant and keep no cache")
    p.add_argument("--rows", type=int, default=20, metavar="N", help="rows of the table to print (default 20)")


class Progress:
    """A bar on a terminal; otherwise a line at every tenth of the work (on stderr)."""

    def __init__(self, stream=None):
        self.stream = stream or sys.stderr
        self.tty = self.stream.isatty()
        self.todo = 0
        self.step = 1

    def start(self, todo, total):
        self.todo = todo
        self.step = max(1, todo // 10)
        self.stream.write(f"study: {total} variants, {total - todo} from the cache, {todo} to run\n")
        self.stream.flush()

    def end_line(self):
        if self.tty and 0 < self.todo:
            self.stream.write("\n")
            self.stream.flush()
            self.todo = 0

    def __call__(self, done, todo, row):
        s = self.stream
        if self.tty:
            width = 30
            fill = width * done // todo
            s.write(f"\r[{'#' * fill}{'.' * (width - fill)}] {done}/{todo} {row['status']:<10}")
            if done == todo:
                s.write("\n")
                self.todo = 0
        elif done % self.step == 0 or done == todo:
            s.write(f"[{done:>{len(str(todo))}}/{todo}] variants run\n")
        s.flush()


def run(args) -> int:
    from sim.errors import InputError
    from sim.files.studyfile import load_study
    from sim.runs.batch import prepare_parent
    from sim.runs.study import default_cache, resolve_column, results_kind, run_study, text_table, write_results

    from sim.procs import cores
    jobs = cores() if args.jobs is None else args.jobs
    if jobs < 1:
        raise InputError("--jobs", None, f"must be a whole number >= 1, got {jobs}")
    if args.output:
        results_kind(args.output)
    if args.plot:
        from sim.errors import require
        require("matplotlib", "--plot")
    study = load_study(args.study)
    prepare_parent(1 if args.scheduler else jobs)
    cache = None if args.no_cache else (args.cache or default_cache(study, args.output))
    # the figure names are checked before anything runs
    from sim.runs.study import StudyRun
    probe = StudyRun(study, ["variant"] + [p.name for p in study.parameters] + study.columns() + ["status", "reason"],
                     [], 0, 0)
    sort = resolve_column(probe, args.sort, "--sort") if args.sort else study.columns()[0]
    pair = None
    if args.pareto:
        parts = [s.strip() for s in args.pareto.split(",")]
        if len(parts) != 2 or not all(parts):
            raise InputError("--pareto", None, f"expected two figures FIG_A,FIG_B, got '{args.pareto}'")
        pair = tuple(resolve_column(probe, s, "--pareto") for s in parts)
        if pair[0] == pair[1]:
            raise InputError("--pareto", None, "name two different figures")
    elif len(study.columns()) >= 2:
        pair = tuple(study.columns()[:2])
    progress = Progress()
    try:
        res = run_study(study, jobs=jobs, scheduler=args.scheduler, cache=cache,
                        on_done=progress, on_start=progress.start)
    except KeyboardInterrupt:
        progress.end_line()
        if cache:
            print(f"study: the variants done so far are kept in {cache}; run again to go on", file=sys.stderr)
        raise
    print(text_table(res, sort, args.rows, pair if (args.pareto or args.plot) else None))
    if args.output:
        write_results(args.output, res)
        print(f"\nresults   {args.output}")
    if args.plot:
        from sim.view.studyplot import plot_study
        plot_study(args.plot, res, sort, pair)
        print(f"plot      {args.plot}")
    return 0 if any(r["status"] == "ok" for r in res.rows) else 1
