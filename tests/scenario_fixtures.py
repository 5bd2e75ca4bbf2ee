"""Shared by the scenario and command-line tests: the repository root, the
shipped scenarios, and the smallest valid scenario (invented values)."""
import pathlib

ROOT = pathlib.Path(__file__).resolve().parents[1]
SHIPPED = sorted(p for p in (ROOT / "scenarios").glob("*.toml") if "sweep" not in p.name and "layout" not in p.name)

BASE = """
[domain]
lower = [0, 0, 0]
upper = ["1 m", "1 m", "1 m"]

[[populations]]
name = "dust"
diameter = "2.5 um"
count = 10

[time]
step = "1 ms"
end = "10 ms"
"""
