"""`quietlayer demo`: measure the built-in demo scenario (or a file) and print its scores."""

from __future__ import annotations

from quietlayer.app import CAUTION

from .common import EXIT_OK, db, load, problem_line


def add_parser(commands):
    demo = commands.add_parser("demo", help="measure the layer of the built-in demo scenario (or a file)")
    demo.add_argument("--scenario", metavar="FILE.toml", help="a scenario file instead of the demo")
    return demo


def run(args) -> int:
    path = args.scenario
    from quietlayer.assets import preset_path
    from quietlayer.engine import Scenario
    from quietlayer.engine.measure import LATE_STEPS, measure

    scenario = load(path, late_steps=LATE_STEPS) if path else Scenario.from_toml(preset_path("demo").read_text("utf-8"))
    result = measure(scenario)
    s = result.scenario
    print(s.title or path)
    print(f"  {problem_line(s)}")
    print(f"  {'probe':<16}{'peak error':>12}")
    for name, value in result.peak_db.items():
        print(f"  {name:<16}{db(value, 12)}")
    print(f"  worst peak error {db(result.worst_peak_db)} ({result.worst_probe}); "
          f"global error {db(result.global_db)}")
    if result.late is not None:
        print(f"  late-time check ({result.late.steps} steps): {result.late.status}, {result.late.message}")
    source = "cached" if result.reference_cached else f"computed in {result.reference_s * 1e3:.0f} ms"
    print(f"  test run {result.test_s * 1e3:.0f} ms, reference {source}, all {result.elapsed_s:.2f} s")
    print(CAUTION)
    return EXIT_OK
