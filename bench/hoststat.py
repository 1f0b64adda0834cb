"""What the host did to this machine during a measurement: CPU time stolen by the hypervisor.

On a shared virtual machine, steal (time the hypervisor gave this machine's
virtual CPUs to someone else) explains most of the spread between runs of
the same code; both benches report it beside their figures.
"""

from __future__ import annotations

from pathlib import Path


def cpu_ticks() -> tuple:
    """(steal, total) jiffies of all CPUs from /proc/stat (Linux), or (0, 0) elsewhere."""
    try:
        fields = [int(v) for v in Path("/proc/stat").read_text().split("\n", 1)[0].split()[1:]]
    except (OSError, ValueError):
        return 0, 0
    return (fields[7] if len(fields) > 7 else 0), sum(fields)


def steal_share(before: tuple, after: tuple) -> float:
    """Share of the machine's CPU time stolen between two :func:`cpu_ticks` readings (0 where unknown)."""
    return (after[0] - before[0]) / max(after[1] - before[1], 1)
