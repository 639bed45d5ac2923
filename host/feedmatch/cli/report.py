"""The `report` command: the logbook per band, the antenna's health, plots and CSV."""

from __future__ import annotations

import sys

from feedmatch.cli.output import emit_json
from feedmatch.errors import InputError
from feedmatch.outpaths import output_dir, output_file


def cmd_report(a) -> int:
    from feedmatch.logbook.report import make_report, report_lines, report_plots, write_csv

    if a.since:
        from datetime import datetime

        try:
            datetime.fromisoformat(a.since)
        except ValueError:
            raise InputError(f"--since needs an ISO date such as 2026-11-01, got '{a.since}'") from None
    if a.csv:
        output_file(a.csv, "--csv", (".csv",))
    if a.plots:
        output_dir(a.plots, "--plots")
    rep = make_report(a.db, a.since)
    from feedmatch.sim.curve import add_antenna

    add_antenna(rep, a.db, a.since)  # health in ohms, from the antenna the tunes measured
    if a.csv:
        write_csv(a.csv, rep["rows"], rep["banks"])
    files = report_plots(a.plots, rep["rows"], rep["bin_widths"]) if a.plots else []
    written = ([a.csv] if a.csv else []) + [str(f) for f in files]
    if a.json:
        for f in written:
            sys.stderr.write(f"wrote {f}\n")  # stdout is the JSON's alone
        emit_json({"tunes": rep["tunes"], "bands": rep["bands"], "antenna_notes": rep["antenna_notes"]})
    else:
        print("\n".join(report_lines(rep)))
        for f in written:
            print(f"wrote {f}")
    return 0


def _parser_report(sub) -> None:
    s = sub.add_parser("report", help="per-band table and antenna-health flags from the logbook")
    s.add_argument("--db", required=True, help="the SQLite logbook that `feedmatch log` writes")
    s.add_argument("--since", help="ISO date, e.g. 2026-11-01")
    s.add_argument("--plots", help="directory for PNG plots")
    s.add_argument("--csv", help="write the tune rows as CSV")
    s.add_argument("--json", action="store_true", help="print one JSON object instead of the table")
    s.set_defaults(fn=cmd_report)


# The commands of this module (feedmatch.cli.COMMANDS): name -> the function that adds its
# parser, which sets fn, the function that runs it.
PARSERS = {
    "report": _parser_report,
}
