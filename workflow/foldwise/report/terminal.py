"""The run's last lines on the terminal: the warnings counted from the jobs' logs, and where the report is.

``workflow/rules/common.smk`` prints the group summaries and then
:func:`closing_lines` when the run succeeds; the report's Warnings section
lists the same warnings (:func:`job_warnings`), so the two agree.
"""

import textwrap
from pathlib import Path

__all__ = ["job_warnings", "closing_lines", "fit_lines"]

#: Longest line printed at the end of a run (characters); longer summary lines are wrapped.
TERMINAL_WIDTH = 120


def job_warnings(job_logs):
    """``(job, message)`` for every WARNING line of the jobs' logs, in plan order.

    Parameters
    ----------
    job_logs : sequence of (str, str, str)
        ``[step, wildcards in words, log file]`` (``foldwise.plan.report_job_logs``);
        a log that does not exist (a job not run in this tree) is skipped.

    Returns
    -------
    list of (str, str)
    """
    found = []
    for step, label, path in job_logs:
        try:
            lines = Path(path).read_text(encoding="utf-8", errors="replace").splitlines()
        except OSError:
            continue
        job = f"{step} {label}".strip()
        found += [(job, line[len("WARNING "):]) for line in lines if line.startswith("WARNING ")]
    return found


def closing_lines(n_warnings, report_path, logs_dir="results/logs"):
    """The last lines of a successful run: the warning count, then the report's path (always the last line).

    ``logs_dir`` is the study's log folder (``<study.results_dir>/logs``).

    Examples
    --------
    >>> closing_lines(0, "results/report/index.html")
    ['foldwise: no warnings.', 'foldwise: report: results/report/index.html']
    >>> closing_lines(3, "results/report/index.html")[0]
    "foldwise: 3 warnings (each job's log under results/logs/; all of them in the report's Warnings section)."
    >>> closing_lines(1, "results_b/report/index.html", "results_b/logs")[0]
    "foldwise: 1 warning (each job's log under results_b/logs/; all of them in the report's Warnings section)."
    """
    if n_warnings:
        count = (f"foldwise: {n_warnings} warning{'s' if n_warnings != 1 else ''} (each job's log under {logs_dir}/; "
                 "all of them in the report's Warnings section).")
    else:
        count = "foldwise: no warnings."
    return [count, f"foldwise: report: {report_path}"]


def fit_lines(text, width=TERMINAL_WIDTH):
    """``text`` with every line longer than ``width`` wrapped, continuation lines indented two more spaces.

    Examples
    --------
    >>> print(fit_lines("  roi ember: " + "word " * 5, width=20))
      roi ember: word
        word word word
        word
    """
    lines = []
    for line in text.rstrip().splitlines():
        if len(line) <= width:
            lines.append(line)
            continue
        indent = line[: len(line) - len(line.lstrip())]
        lines += textwrap.wrap(line.strip(), width=width, initial_indent=indent, subsequent_indent=indent + "  ",
                               break_long_words=False, break_on_hyphens=False)
    return "\n".join(lines)
