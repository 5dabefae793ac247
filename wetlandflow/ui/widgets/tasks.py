"""Background tasks for notebooks: progress, elapsed time, estimate, cooperative cancel, one output area.

A job is a function ``job(control) -> result``.  :class:`BackgroundTask` runs it in
a daemon thread so the kernel stays free; the job calls ``control.check()`` at its
cancel points (places where stopping leaves no half-written output) and
``control.report(stage, done, total)`` as it goes.  :class:`TaskPanel` shows the
run and cancel buttons, a progress bar, the elapsed time and an estimate of the
time left, and replaces the content of its one output area when the job ends.
Widgets are updated by assigning their traits (``Output.outputs`` included), which
is safe from any thread.
"""

from __future__ import annotations

import base64
import io
import threading
import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import Any

import ipywidgets as w
import numpy as np
import pandas as pd

from ...errors import Cancelled, WetlandflowError  # noqa: F401  (Cancelled re-exported)


# -- progress and cancel -------------------------------------------------------------------------------------
def estimate_remaining(elapsed_s: float, fraction: float) -> float | None:
    """Seconds left if the rest goes at the pace so far (``None`` before any progress or after the end)."""
    if not 0.0 < fraction < 1.0:
        return None
    return elapsed_s * (1.0 - fraction) / fraction


def format_seconds(seconds: float | None) -> str:
    """``"42 s"``, ``"3 min 05 s"`` or ``"1 h 02 min"``; ``"-"`` when unknown."""
    if seconds is None or not np.isfinite(seconds):
        return "-"
    s = int(round(seconds))
    if s < 60:
        return f"{s} s"
    if s < 3600:
        return f"{s // 60} min {s % 60:02d} s"
    return f"{s // 3600} h {(s % 3600) // 60:02d} min"


class TaskControl:
    """What a job and its panel share: the cancel flag and the progress the job reports.

    A job calls :meth:`check` at its cancel points (it raises :class:`Cancelled` once
    :meth:`cancel` was called) and :meth:`report` as it goes; observers added with
    :meth:`subscribe` are called (in the job's thread) after every report.
    """

    def __init__(self) -> None:
        self._cancel = threading.Event()
        self._lock = threading.Lock()
        self._observers: list[Callable[[TaskControl], None]] = []
        self.stage, self.done, self.total = "", 0.0, 0.0
        self.started: float | None = None
        self.finished: float | None = None

    def cancel(self) -> None:
        self._cancel.set()

    @property
    def cancelled(self) -> bool:
        return self._cancel.is_set()

    def check(self) -> None:
        """Raise :class:`Cancelled` after a cancel; call it only where stopping leaves no half work."""
        if self._cancel.is_set():
            raise Cancelled(
                f"cancelled during {self.stage or 'the task'}; work finished before this point "
                "is kept (see the panel's output)"
            )

    def report(self, stage: str | None = None, done: float | None = None, total: float | None = None) -> None:
        with self._lock:
            self.stage = self.stage if stage is None else stage
            self.done = self.done if done is None else float(done)
            self.total = self.total if total is None else float(total)
        for fn in list(self._observers):
            fn(self)

    def subscribe(self, fn: Callable[[TaskControl], None]) -> None:
        self._observers.append(fn)

    @property
    def fraction(self) -> float:
        return min(1.0, self.done / self.total) if self.total > 0 else 0.0

    @property
    def elapsed(self) -> float:
        if self.started is None:
            return 0.0
        return (self.finished or time.perf_counter()) - self.started


class BackgroundTask:
    """Run ``job(control)`` in a daemon thread; ``status`` is running, done, cancelled or failed."""

    def __init__(self, job: Callable[[TaskControl], Any], control: TaskControl | None = None) -> None:
        self.job = job
        self.control = control or TaskControl()
        self.status = "idle"
        self.result: Any = None
        self.error: BaseException | None = None
        self._thread = threading.Thread(target=self._main, daemon=True, name="wetlandflow-task")

    def start(self) -> BackgroundTask:
        self.status = "running"
        self.control.started = time.perf_counter()
        self._thread.start()
        return self

    def _main(self) -> None:
        try:
            self.result = self.job(self.control)
            self.status = "done"
        except Cancelled as exc:
            self.error, self.status = exc, "cancelled"
        except BaseException as exc:  # shown in the panel: a notebook must not lose the traceback silently
            self.error, self.status = exc, "failed"
        finally:
            self.control.finished = time.perf_counter()

    def wait(self, timeout: float | None = None) -> str:
        """Block until the job ends (or ``timeout`` seconds pass); return the status."""
        self._thread.join(timeout)
        return self.status

    @property
    def running(self) -> bool:
        return self._thread.is_alive()


# -- rendering into an output area ---------------------------------------------------------------------------
def mime_bundle(obj: Any) -> dict[str, Any]:
    """A display bundle for an Output widget: figures as PNG, tables as HTML, the rest as text."""
    from matplotlib.figure import Figure

    if isinstance(obj, Figure):
        buf = io.BytesIO()
        obj.savefig(buf, format="png", dpi=90, bbox_inches="tight")
        return {"image/png": base64.b64encode(buf.getvalue()).decode("ascii"), "text/plain": "<figure>"}
    if isinstance(obj, pd.DataFrame):
        return {
            "text/html": obj.to_html(max_rows=30, float_format=lambda v: f"{v:.4g}"),
            "text/plain": str(obj),
        }
    if isinstance(obj, Html):
        return {"text/html": obj.text, "text/plain": obj.text}
    return {"text/plain": str(obj)}


@dataclass(frozen=True)
class Html:
    """A piece of HTML for :func:`mime_bundle`."""

    text: str


def show_in(output: w.Output, *objs: Any) -> None:
    """Replace what ``output`` shows by ``objs`` (redrawn in place, safe from any thread)."""
    output.outputs = tuple(
        {"output_type": "display_data", "data": mime_bundle(o), "metadata": {}} for o in objs
    )


class TaskPanel(w.VBox):
    """Run and cancel buttons, a progress bar with elapsed time and estimate, and one output area.

    Parameters
    ----------
    job : callable
        ``job(control) -> result``, run in a background thread.
    render : callable, optional
        ``render(result) -> list of objects`` to show when the job is done (figures, tables, text).
    render_stopped : callable, optional
        ``render_stopped(task) -> list`` shown after a cancel or a failure (what was kept).
    title, run_label : str
    interval : float
        Seconds between redraws of the progress line.
    """

    def __init__(
        self,
        job: Callable[[TaskControl], Any],
        *,
        render: Callable[[Any], Sequence[Any]] | None = None,
        render_stopped: Callable[[BackgroundTask], Sequence[Any]] | None = None,
        title: str = "",
        run_label: str = "Run",
        interval: float = 0.5,
    ) -> None:
        self.job, self.render, self.render_stopped, self.interval = job, render, render_stopped, interval
        self.run_button = w.Button(description=run_label, button_style="primary", icon="play")
        self.cancel_button = w.Button(
            description="Cancel", button_style="warning", icon="stop", disabled=True
        )
        self.progress = w.FloatProgress(value=0.0, min=0.0, max=1.0, layout=w.Layout(width="40%"))
        self.status = w.HTML(value="ready")
        self.output = w.Output(layout=w.Layout(border="1px solid #ddd", min_height="2em"))
        self.task: BackgroundTask | None = None
        self._ticker: threading.Thread | None = None
        self.run_button.on_click(lambda _: self.start())
        self.cancel_button.on_click(lambda _: self.cancel())
        head = [w.HTML(f"<b>{title}</b>")] if title else []
        super().__init__(
            head + [w.HBox([self.run_button, self.cancel_button, self.progress]), self.status, self.output]
        )

    def start(self) -> BackgroundTask:
        """Start the job (ignored while one is running); returns the task."""
        if self.task is not None and self.task.running:
            return self.task
        self.task = BackgroundTask(self.job).start()
        self.run_button.disabled, self.cancel_button.disabled = True, False
        show_in(self.output, "running ...")
        self._ticker = threading.Thread(target=self._tick, args=(self.task,), daemon=True)
        self._ticker.start()
        return self.task

    def cancel(self) -> None:
        if self.task is not None and self.task.running:
            self.task.control.cancel()
            self.status.value = "cancelling at the next cancel point ..."

    def wait(self, timeout: float | None = None) -> str:
        """Block until the job and the final redraw are finished; return the task's status."""
        if self.task is None:
            return "idle"
        self.task.wait(timeout)
        if self._ticker is not None:
            self._ticker.join(timeout)
        return self.task.status

    def _line(self, task: BackgroundTask) -> str:
        c = task.control
        count = f" ({c.done:g} of {c.total:g})" if c.total else ""
        left = (
            ""
            if task.status != "running"
            else f", about {format_seconds(estimate_remaining(c.elapsed, c.fraction))} left"
        )
        return f"{task.status}: {c.stage}{count}; elapsed {format_seconds(c.elapsed)}{left}"

    def _tick(self, task: BackgroundTask) -> None:
        while task.running:
            self.progress.value = task.control.fraction
            self.status.value = self._line(task)
            time.sleep(self.interval)
        self._finish(task)

    def _finish(self, task: BackgroundTask) -> None:
        self.progress.value = 1.0 if task.status == "done" else task.control.fraction
        self.progress.bar_style = {"done": "success", "cancelled": "warning"}.get(task.status, "danger")
        self.status.value = self._line(task)
        try:
            if task.status == "done":
                show_in(self.output, *(self.render(task.result) if self.render else [repr(task.result)]))
            else:
                kept = list(self.render_stopped(task)) if self.render_stopped else []
                show_in(self.output, f"{type(task.error).__name__}: {task.error}", *kept)
        except Exception as exc:  # a failed redraw must not hide the job's own result
            show_in(self.output, f"could not show the result: {type(exc).__name__}: {exc}")
        self.run_button.disabled, self.cancel_button.disabled = False, True
