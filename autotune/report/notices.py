"""What a reader must know before reading a report: a run still being written, a damaged journal.

Both change what the page and the terminal can be trusted for, so they come first on both: the
terminal prints them as ``NOTE:`` lines before the summary, and the page shows them in a box at
the top, above the flags, in plain words (what happened, what the report shows because of it,
what to do).
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path

from autotune.report.model import Run
from autotune.run.runlock import holder_if_running, holder_text


@dataclass(frozen=True)
class Notice:
    """One thing to know first.

    Attributes
    ----------
    kind : {"running", "damaged"}
        A run folder held by a live process, or a journal damaged before its end.
    title : str
        A few words for the page's heading of the notice.
    text : str
        The terminal's one line (after ``NOTE:``): where, what, and what the report shows.
    page : str
        The same in sentences for the page, with what to do.
    """

    kind: str
    title: str
    text: str
    page: str


def report_notices(path: Path, runs: Sequence[Run]) -> list[Notice]:
    """The notices of the report of ``path`` (a run folder or a folder of them) and its runs.

    A folder is "still running" while a live process holds its lock
    (:func:`autotune.run.runlock.holder_if_running`; the folder of runs itself too, as a dry run
    holds it; one process holding several folders is told once, at its run's folder); a journal
    is damaged where :func:`autotune.run.journal.read_journal_prefix` stopped.
    """
    notices = []
    counts = {run.path: len(run.records) for run in runs}
    told: set[object] = set()
    # The runs first: a dry run holds its own folder and the stage's, one process told once.
    for folder in dict.fromkeys([*(run.path for run in runs), Path(path)]):
        holder = holder_if_running(folder)
        if holder is None or (holder.get("pid") is not None and holder.get("pid") in told):
            continue
        told.add(holder.get("pid"))
        who = holder_text(holder)
        written = (f"the {counts[folder]} journal records written so far" if folder in counts
                   else "the records written so far")
        notices.append(Notice(
            "running", "This run was still going when the report was made",
            f"{folder}: the run is still going ({who}); this report shows the records written "
            f"so far",
            f"The run in {folder} was still being written when this report was made, by {who}. "
            f"This report shows only {written}: its last steps, its result and its flags may "
            f"be missing or change. Make the report again once the run has ended."))
    for run in runs:
        damage = run.damage
        if damage is None:
            continue
        n = len(run.records)
        notices.append(Notice(
            "damaged", "A damaged journal: this report stops before the damage",
            f"{damage.where()}; this report shows the {n} records before it and nothing after "
            f"it",
            f"The journal {damage.path} is damaged at line {damage.line}: record number "
            f"{damage.expected_seq} was expected there, but the line holds {damage.found}. "
            f"The likely cause: {damage.cause}. This report shows the {n} records before that "
            f"line and nothing after it, so anything the run did later is not here. The file "
            f"was left as it is; a resume of this run is refused, start a new run with --out."))
    return notices
