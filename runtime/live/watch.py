"""``hilrig watch``: the live view, a separate process that subscribes to a run's telemetry.

It never slows the loop: it only reads frames the runtime publishes (and drops when nobody
keeps up) and sends the operator's commands back (stop, reset). On a terminal it draws a
screen that fits 80 x 24 and reads single keys; otherwise it prints a plain line a second.
When the runtime goes away it says so and keeps waiting.
"""
from __future__ import annotations

import math
import os
import select
import sys
import time
from typing import Any

import msgpack
import zmq

from hilrig.safety.caution import NOTICE_STYLE, SIGNAL_STYLE, WARNING_SHORT

from .telemetry import command_address

KEYS_HELP = "s stop run   r reset trip   f freeze trace   q close viewer"
GONE_AFTER_S = 2.0


def _fmt(v: float, unit: str) -> str:
    if v is None or not math.isfinite(v):
        return f"{v} {unit}"
    a = abs(v)
    for f, p in ((1e6, "M"), (1e3, "k")):
        if a >= f * 10 and unit in ("W", "V/s"):
            return f"{v / f:.1f} {p}{unit}"
    return f"{v:.1f} {unit}" if a < 1e4 else f"{v:.3g} {unit}"


def _bar(value: float, limit: float, width: int = 10) -> str:
    if not (limit and math.isfinite(value)):
        return " " * width
    frac = max(0.0, min(1.0, abs(value) / abs(limit)))
    n = int(round(frac * width))
    return "#" * n + "-" * (width - n)


def trace_lines(tr: dict, width: int, height: int) -> list[str]:
    """A text plot of v_out (o) and the reference (.) over the trace window."""
    t, vo, vr = tr.get("t", []), tr.get("v_out", []), tr.get("v_ref", [])
    pts = [(a, b, c) for a, b, c in zip(t, vo, vr) if math.isfinite(b) and math.isfinite(c)]
    if len(pts) < 2:
        return ["(waiting for data)"] + [""] * (height - 1)
    lo = min(min(p[1], p[2]) for p in pts)
    hi = max(max(p[1], p[2]) for p in pts)
    if hi - lo < 1e-9:
        lo, hi = lo - 1.0, hi + 1.0
    t0, t1 = pts[0][0], pts[-1][0]
    label_w = 7
    w = max(10, width - label_w)
    grid = [[" "] * w for _ in range(height)]

    def put(tt, v, ch):
        x = int((tt - t0) / (t1 - t0 + 1e-12) * (w - 1))
        y = height - 1 - int((v - lo) / (hi - lo) * (height - 1))
        if grid[y][x] == " " or ch == "o":
            grid[y][x] = ch
    for a, b, c in pts:
        put(a, c, ".")
        put(a, b, "o")
    out = []
    for i, row in enumerate(grid):
        label = f"{hi:6.1f} " if i == 0 else f"{lo:6.1f} " if i == height - 1 else " " * label_w
        out.append(label + "".join(row))
    return out


def unit_cells(units: dict | None) -> list[str]:
    """One short cell per paralleled unit (a frame's ``units``): its number, output current and
    deviation from its share in %, or "off" while its gates are blocked (the cause is in the
    protection panel)."""
    if not units:
        return []
    cells = []
    for k, i, _share, _dev, pct, on, _bits, _cause in units.get("rows") or []:
        cur = f"{i:7.1f}A" if i is not None and math.isfinite(i) else "    n/aA"
        if not on:
            cells.append(f"{k:>2}{cur}    off")
        else:
            dev = f"{pct:+6.1f}%" if pct is not None and math.isfinite(pct) else "    n/a"
            cells.append(f"{k:>2}{cur}{dev}")
    return cells


def unit_lines(units: dict | None, room: int, per_line: int = 2) -> list[str]:
    """The units' cells, ``per_line`` to a line, in at most ``room`` lines; when they do not
    fit, the units off or farthest from their share, and how many more there are."""
    cells = unit_cells(units)
    if not cells or room <= 0:
        return []
    if len(cells) > room * per_line:
        rows = units.get("rows") or []
        order = sorted(range(len(rows)), key=lambda j: (
            rows[j][5] != 0, -abs(rows[j][4]) if rows[j][4] is not None
            and math.isfinite(rows[j][4]) else 0.0))
        keep = room * per_line - 1
        rest = len(cells) - keep
        cells = [cells[j] for j in sorted(order[:keep])] + [f"(+{rest} more units)"]
    return [" ".join(f"{c:<17}" for c in cells[i:i + per_line]).rstrip()
            for i in range(0, len(cells), per_line)][:room]


def unit_trip_text(units: dict | None) -> str | None:
    """Which units are off now and why, else the last trip of a unit seen (None: none)."""
    if not units:
        return None
    off = [f"{r[0]} ({r[7] or 'blocked'})" for r in units.get("rows") or [] if not r[5]]
    if off:
        return "unit TRIPPED: " + ", ".join(off)
    trips = units.get("trips") or []
    if trips:
        k, cause, t = trips[-1]
        return f"last unit trip: {k} ({cause}) at t = {t:.4f} s"
    return None


class View:
    """Keeps the newest frame and renders it."""

    def __init__(self):
        self.frame: dict[str, Any] | None = None
        self.last_rx = None
        self.frozen_trace = None
        self.message = ""
        self.started = time.monotonic()

    def gone_for(self) -> float | None:
        if self.last_rx is None:
            return None
        dt = time.monotonic() - self.last_rx
        return dt if dt > GONE_AFTER_S else None

    def status_line(self) -> str:
        f = self.frame
        gone = self.gone_for()
        if f is None:
            return "waiting for telemetry ..."
        ts = f["t"] / f["tick"] if f["tick"] else 0.0
        prog = f"t = {f['t']:.3f} s of {f['n_total'] * ts:.4g} s"
        pct = 100.0 * f["tick"] / max(f["n_total"], 1)
        state = "ended: " + (f["end_event"] or "completed") if f["ended"] else (
            "no telemetry for %.0f s: the runtime is gone" % gone if gone else "running")
        return f"{prog} ({pct:.0f} %)  {state}"

    def plain_line(self) -> str:
        f = self.frame
        if f is None:
            return "waiting for telemetry ..."
        vals = "  ".join(f"{k} {_fmt(v[0], v[1])}" for k, v in f["values"].items()
                         if k in ("v_out", "v_ref", "i_out", "u"))
        prot = f"TRIPPED ({f['cause']})" if f["latched"] else "ok"
        line = f"{self.status_line()} | {vals} | protection {prot}"
        units = f.get("units")
        if units:
            cells = unit_cells(units)
            if cells:  # none before the first recorded row
                line += " | units " + ", ".join(c.strip() for c in cells)
            trip = unit_trip_text(units)
            if trip:
                line += " | " + trip
        return line

    def render(self, width: int = 80):
        from rich.console import Group
        from rich.panel import Panel
        from rich.table import Table
        from rich.text import Text
        f = self.frame
        head = Text()
        title = (f or {}).get("title") or "run"
        # a publisher's text never reaches the terminal raw (escape codes shown as escapes)
        title = "".join(ch if ch.isprintable() else repr(ch)[1:-1] for ch in str(title))
        head.append(" hilrig live view ", style="bold reverse")
        head.append(f"  {title}"[:40])
        if f and f.get("demo_data"):
            head.append("  [demo data]", style="dim")
        parts: list[Any] = [head, Text(" " + self.status_line(),
                                       style="bold red" if self.gone_for() else "")]
        if f and f.get("caution"):
            # WARNING in its ANSI Z535 colour, orange (a terminal approximates it:
            # safety.caution.SIGNAL_COLOUR); the signal word on its colour panel
            word, rest = WARNING_SHORT.split(":", 1)
            line = Text()
            line.append(f" {word} ", style=SIGNAL_STYLE)
            line.append(rest, style=NOTICE_STYLE)
            parts.append(line)
        if f is None:
            parts.append(Text("\n waiting for the run's telemetry ... (a first run of a plugin "
                              "combination compiles its loop first: up to a minute)"))
            parts.append(Text(" keys: " + KEYS_HELP, style="dim"))
            return Group(*parts)
        limits = {}
        for sig, side, thr, unit in f["limits"]:
            if side in ("above", "magnitude_above"):
                limits.setdefault(sig, thr)
        sig_t = Table.grid(padding=(0, 1))
        for col in ("name", "value", "bar", "limit"):
            sig_t.add_column(col, no_wrap=True)
        for name, (v, unit) in f["values"].items():
            lim = limits.get(name)
            style = "bold red" if lim is not None and math.isfinite(v) and abs(v) > lim else ""
            sig_t.add_row(name, Text(_fmt(v, unit), style=style), _bar(v, lim) if lim else "",
                          _fmt(lim, unit) if lim is not None else "")
        units = f.get("units")
        if units:
            # paralleled units: a compact cell per unit below the bus signals (the panel's
            # 8 lines; units off or farthest from their share first when not all fit)
            lines_u = unit_lines(units, 8 - len(f["values"]))
            sig_t = Group(sig_t, Text("\n".join(lines_u))) if lines_u else sig_t
        half = max(30, width // 2 - 1)
        tr = self.frozen_trace if self.frozen_trace is not None else f["trace"]
        lines = trace_lines(tr, half - 4, 7)
        err = ""
        if "v_out" in f["values"] and "v_ref" in f["values"]:
            err = f"tracking error {f['values']['v_ref'][0] - f['values']['v_out'][0]:+.2f} V"
        trace_title = "v_out (o) and reference (.)" + ("  FROZEN" if self.frozen_trace is not None else "")
        top = Table.grid(expand=True)
        top.add_column(ratio=1)
        top.add_column(ratio=1)
        top.add_row(Panel(sig_t, title="signals" + (", units: A, % off share" if units else ""),
                          title_align="left", height=10),
                    Panel(Text("\n".join(lines) + "\n" + err), title=trace_title,
                          title_align="left", height=10))
        if f["latched"]:
            # only the label sits on red: the cause is red text on the terminal's own
            # background (a style given to Text() would be the base of every span)
            prot = Text()
            prot.append("TRIPPED", style="bold white on red")
            prot.append("  ")
            prot.append(f"{f['cause']}", style="bold red")
            if f["trip_t"] is not None:
                prot.append(f"\nat t = {f['trip_t']:.4f} s")
        else:
            prot = Text("armed, no trip", style="bold green")
        utrip = unit_trip_text(f.get("units"))
        if utrip:
            prot.append("\n" + utrip[:70], style="bold red" if utrip.startswith("unit TRIPPED")
                        else "yellow")
        wd = [n for b, n in ((40, "overrun"), (41, "stale"), (42, "seq gap"), (43, "peer lost"))
              if (f["word"] >> b) & 1]
        if wd:
            prot.append("\nwatchdog: " + ", ".join(wd), style="yellow")
        if f["events"]:
            prot.append("\nlast: " + f["events"][-1][1][:60])
        tm = f["timing"]
        tim = Text(f"ticks/s {tm['ticks_per_s']:,.0f}")
        if tm.get("lateness_p99_us") is not None:
            tim.append(f"\nlateness p99 {tm['lateness_p99_us']:.1f} us")
            tim.append(f"\nlate ticks {tm['late_ticks']}")
            tim.append(f"\ncompute p99 {tm['compute_p99_us']:.1f} us")
        br = f.get("bridge")
        if br:
            tim.append(f"\nbridge: sent {br.get('frames_sent')}, lost {br.get('lost')}")
        bottom = Table.grid(expand=True)
        bottom.add_column(ratio=1)
        bottom.add_column(ratio=1)
        bottom.add_row(Panel(prot, title="protection", title_align="left", height=6),
                       Panel(tim, title="timing", title_align="left", height=6))
        parts += [top, bottom, Text(" keys: " + KEYS_HELP, style="dim")]
        if self.message:
            parts.append(Text(" " + self.message, style="bold"))
        return Group(*parts)


def _keep_off_the_loop_core() -> None:
    """A paced loop runs on the last core: keep this process off it, at a lower priority."""
    try:
        os.nice(5)
        cores = sorted(os.sched_getaffinity(0))
        if len(cores) > 1:
            os.sched_setaffinity(0, set(cores[:-1]))
    except (AttributeError, OSError):
        pass


class _Keys:
    """Single key presses from a terminal (cbreak mode), restored on exit."""

    def __init__(self):
        self.fd = None
        if sys.stdin.isatty():
            import termios
            import tty
            self.fd = sys.stdin.fileno()
            self.old = termios.tcgetattr(self.fd)
            tty.setcbreak(self.fd)

    def read(self, timeout: float) -> str | None:
        if self.fd is None:
            time.sleep(timeout)
            return None
        r, _, _ = select.select([self.fd], [], [], timeout)
        if r:
            return os.read(self.fd, 1).decode("utf-8", "ignore")
        return None

    def close(self) -> None:
        if self.fd is not None:
            import termios
            termios.tcsetattr(self.fd, termios.TCSADRAIN, self.old)


def connect(address: str, curve_keys=None) -> tuple[zmq.Socket, zmq.Socket]:
    """The viewer's sockets: SUB for frames, PUSH for commands; with ``curve_keys`` (a folder
    made by ``hilrig keys``) as a CurveZMQ client with the folder's client pair."""
    ctx = zmq.Context.instance()
    sub = ctx.socket(zmq.SUB)
    push = ctx.socket(zmq.PUSH)
    if curve_keys is not None:
        from hilrig.bridge.keys import client_keys
        pub, sec, server_pub = client_keys(curve_keys)
        for sock in (sub, push):
            sock.curve_publickey, sock.curve_secretkey = pub, sec
            sock.curve_serverkey = server_pub
    sub.setsockopt(zmq.SUBSCRIBE, b"")
    sub.setsockopt(zmq.RCVHWM, 10)
    sub.setsockopt(zmq.LINGER, 0)
    sub.connect(address)
    push.setsockopt(zmq.LINGER, 0)
    push.setsockopt(zmq.SNDHWM, 10)
    push.connect(command_address(address))
    return sub, push


def watch(address: str, *, plain: bool = False, exit_when_done: bool = False,
          give_up_s: float | None = None, linger_s: float = 2.0, curve_keys=None) -> int:
    """Run the viewer until q (or the run's end with ``exit_when_done``, or ``give_up_s``
    without any frame)."""
    _keep_off_the_loop_core()
    sub, push = connect(address, curve_keys)
    view = View()
    tty = sys.stdout.isatty() and not plain
    keys = _Keys() if tty else None
    ended_at = None
    last_plain = 0.0
    gone_said = False

    def send(cmd: str) -> None:
        try:
            push.send(cmd.encode(), zmq.NOBLOCK)
            view.message = f"sent: {cmd}"
        except zmq.Again:
            view.message = f"could not send {cmd}: the runtime is not listening"

    def pump() -> None:
        while sub.poll(0):
            data = sub.recv()
            try:
                f = msgpack.unpackb(data, raw=False)
            except Exception:
                continue
            if isinstance(f, dict) and f.get("v") == 1:
                prev = view.frame
                view.frame = f
                view.last_rx = time.monotonic()
                if prev and f["events"] and f["events"] != prev.get("events"):
                    view.message = f["events"][-1][1]

    try:
        if tty:
            from rich.console import Console
            from rich.live import Live
            console = Console()
            with Live(view.render(console.width), console=console, screen=True,
                      auto_refresh=False) as live:
                while True:
                    pump()
                    k = keys.read(0.05)
                    if k in ("q", "Q"):
                        break
                    if k in ("s", "S"):
                        send("stop")
                    elif k in ("r", "R"):
                        send("reset")
                    elif k in ("f", "F"):
                        view.frozen_trace = None if view.frozen_trace is not None else (
                            view.frame["trace"] if view.frame else None)
                    live.update(view.render(console.width), refresh=True)
                    if view.frame and view.frame["ended"]:
                        ended_at = ended_at or time.monotonic()
                        if exit_when_done and time.monotonic() - ended_at > linger_s:
                            break
                    if give_up_s and view.last_rx is None and time.monotonic() - view.started > give_up_s:
                        break
        else:
            while True:
                pump()
                now = time.monotonic()
                gone = view.gone_for()
                if gone and not gone_said and not (view.frame and view.frame["ended"]):
                    print(f"no telemetry for {gone:.0f} s: the runtime is gone (still waiting)",
                          flush=True)
                    gone_said = True
                elif not gone:
                    gone_said = False
                if now - last_plain >= 1.0 and not gone:
                    print(view.plain_line(), flush=True)
                    last_plain = now
                if view.frame and view.frame["ended"] and ended_at is None:
                    print(view.plain_line(), flush=True)
                    if exit_when_done:
                        break
                    ended_at = now
                last = view.last_rx if view.last_rx is not None else view.started
                if give_up_s and now - last > give_up_s:
                    print(f"no telemetry for {give_up_s:g} s: giving up", flush=True)
                    break
                time.sleep(0.05)
    except KeyboardInterrupt:
        pass
    finally:
        if keys:
            keys.close()
        sub.close(0)
        push.close(0)
    return 0
