"""Summaries of stored runs, read block by block: memory bounded whatever the run length.

``open_run(path).summary()`` holds the whole segment table in memory (about
37 bytes a segment, several segments a cycle, plus the temporaries of the
event metrics). :func:`summarize_file` gives the same summary, bit for bit,
from a bounded number of rows at a time:

* the window metrics (means, RMS, losses, extrema, energy balance) read only
  the rows of the summary window, plus one row before it (the conduction
  state a switching edge at the window's start leaves);
* the per-event metrics (start-up, load and supply steps) span the whole
  run; they are accumulated over blocks of :data:`BLOCK_ROWS` rows: the
  extremes of a signal over an interval are the extremes over its pieces,
  and the last excursion out of the settling band lies in the last block
  that leaves the band, which alone is read again to locate it.

Every row is checked as it is read (:func:`bucksim.io.runfile.check_rows`), so
a corrupt file is refused wherever the corruption lies.
"""

from __future__ import annotations

from bucksim.analysis.extrema import piece_extrema
from bucksim.analysis.summarize import summarize
from bucksim.analysis.summary import Summary
from bucksim.analysis.transients import (
    DEFAULT_BAND,
    _events,
    _pieces,
    _settle_time,
    _target,
    event_record,
)
from bucksim.engine.driver import EngineResult
from bucksim.errors import StorageError
from bucksim.io.runfile import guarded_read, open_run_file, read_rows
from bucksim.waveforms import Run

__all__ = ["BLOCK_ROWS", "read_run_info", "summarize_file"]

#: Rows read at a time (about 2.4 MB for a two-state stage, plus the temporaries
#: of the exact extrema on as many pieces).
BLOCK_ROWS = 1 << 16


def read_run_info(path):
    """The checked header of a run file (:class:`bucksim.io.runfile.RunHeader`):
    scenario, ``n_segments``, ``t_end``, ``status``, ``message``."""
    with open_run_file(path) as (_, head):
        return head


def summarize_file(path, cycles: int | None = None) -> Summary:
    """Summary of the run stored in ``path`` over its last ``cycles`` periods.

    Equal to ``open_run(path).summary(cycles)`` (the same numbers, to the
    bit) while holding at most a few blocks of :data:`BLOCK_ROWS` rows.

    Raises
    ------
    StorageError
        As :func:`bucksim.io.runfile.open_run`, or when the file holds no segments.
    SimulationError
        When the stored run diverged (no summary of a diverged run).
    """
    with open_run_file(path) as (f, head):
        if head.n_segments == 0:
            raise StorageError(head.path, "holds no segments: there is nothing to summarise")
        return _FileSummary(f, head).summary(cycles)


class _FileSummary:
    def __init__(self, f, head):
        self.f, self.head = f, head
        self.t0 = f["segments/t0"]

    def run(self, start, stop, previous_t0=None):
        """A Run of rows ``[start, stop)`` plus the row after (the later segment at
        its end boundary, as in the whole run); ``previous_t0`` as for ``read_rows``."""
        head = self.head
        last = min(stop + 1, head.n_segments)
        cols = guarded_read(head.path, read_rows, self.f, head, start, last, previous_t0)
        if last == head.n_segments:
            t_end = head.t_end
        else:
            t_end = float(cols["t0"][-1] + cols["dt"][-1])
        result = EngineResult(cols["t0"], cols["dt"], cols["conduction"], cols["system"],
                              cols["x0"], x_end=head.x_end, t_end=t_end, status=head.status,
                              message=head.message)
        return Run(head.scenario, head.stage, head.table, result, path=head.path)

    def row_at(self, t, before=False) -> int:
        """Index of the last row with ``t0 <= t`` (``before``: ``t0 < t``), 0 if none:
        a bisection on the stored column (rows are in order: :meth:`scan` checked)."""
        lo, hi = 0, self.head.n_segments  # t0[hi] is past t (or hi is the end)
        while hi - lo > 1:
            mid = (lo + hi) // 2
            t_mid = float(guarded_read(self.head.path, self.t0.__getitem__, mid))
            if t_mid < t or (t_mid == t and not before):
                lo = mid
            else:
                hi = mid
        return lo

    # ------------------------------------------------------------------ the summary
    def summary(self, cycles):
        head = self.head
        sc = head.scenario
        stats = self.scan()  # checks every row before any metric is trusted
        width = sc.run.summary_cycles if cycles is None else int(cycles)
        t_start = max(self.first_t0, head.t_end - width * sc.period)
        # from a row that starts before the window: the switching edge at its first
        # row is judged against the conduction state before it, as in the whole run
        tail = self.run(self.row_at(t_start, before=True), head.n_segments)
        return summarize(tail, cycles).with_transients(self.transients(tail, stats))

    def scan(self):
        """Check every row; per event, each block's extremes of vo and iL."""
        head = self.head
        n = head.n_segments
        self.first_t0 = float(guarded_read(head.path, self.t0.__getitem__, 0))
        # events depend on the scenario and t_end only: a one-row run names them
        self.events = _events(self.run(n - 1, n))
        spans = [(t, self.events[i + 1][0] if i + 1 < len(self.events) else head.t_end)
                 for i, (t, _) in enumerate(self.events)]
        stats = [[] for _ in spans]
        previous = None
        for a in range(0, n, BLOCK_ROWS):
            b = min(a + BLOCK_ROWS, n)
            run = self.run(a, b, previous)
            seg = run.segments
            previous = float(seg.t0[b - a - 1])
            start, end = float(seg.t0[0]), float(seg.t0[b - a - 1] + seg.dt[b - a - 1])
            touched = [k for k, (ta, tb) in enumerate(spans) if end > ta and start < tb]
            for k in touched:
                ext = self.block_extrema(run, b - a, *spans[k])
                if ext is not None:
                    stats[k].append((a, b) + ext)
        return stats

    @staticmethod
    def block_extrema(run, rows, ta, tb, with_pieces=False):
        """Pieces of ``[ta, tb]`` among the first ``rows`` rows of a block run, and the
        extremes of vo and iL on them (None if the block holds none)."""
        idx, tau_a, tau_b = _pieces(run, ta, tb)
        keep = idx < rows  # the extra row belongs to the next block
        idx, tau_a, tau_b = idx[keep], tau_a[keep], tau_b[keep]
        if idx.shape[0] == 0:
            return None
        lo, hi = piece_extrema(run, "vo", idx, tau_a, tau_b)
        _, il_hi = piece_extrema(run, "iL", idx, tau_a, tau_b)
        if with_pieces:
            return idx, tau_a, tau_b, lo, hi
        return float(lo.min()), float(hi.max()), float(il_hi.max())

    def target(self, ta, tb):
        """The settled value of an event's interval, from the rows around its end."""
        sc = self.head.scenario
        a = self.row_at(max(ta, tb - sc.period), before=True)
        b = min(self.row_at(tb) + 1, self.head.n_segments)
        return _target(self.run(a, b), ta, tb)

    def transients(self, tail, stats):
        """The per-event metrics of :func:`bucksim.analysis.transients.transients`, over blocks."""
        band = DEFAULT_BAND
        events = self.events
        out = []
        for i, (t_ev, kind) in enumerate(events):
            tb = events[i + 1][0] if i + 1 < len(events) else self.head.t_end
            blocks = stats[i]
            if not blocks:
                continue
            ref = self.target(t_ev, tb)
            vmin = min(s[2] for s in blocks)
            vmax = max(s[3] for s in blocks)
            il_peak = max(s[4] for s in blocks)
            width = band * abs(ref)
            lo_b, hi_b = ref - width, ref + width
            t_last = None
            leaving = [s for s in blocks if s[2] < lo_b or s[3] > hi_b]
            if leaving:
                a, b = leaving[-1][:2]
                run = self.run(a, b)
                idx, ta_, tb_, lo, hi = self.block_extrema(run, b - a, t_ev, tb, True)
                t_last = _settle_time(run, idx, ta_, tb_, lo_b, hi_b, lo, hi)
            out.append(event_record(kind, t_ev, tb, ref, vmin, vmax, il_peak, band, t_last))
        return out

