"""compliance-checker's CF-1.8 suite (reference tool), shared by the tests of every product."""

from pathlib import Path

# compliance-checker 5 tests the strict monotonicity of coordinate variables by subtracting
# neighbouring values, which raises on the string coordinate variables assim writes
# (``basin(basin)``, see assim.io.common.LABELS): that one check cannot run, and is the only
# exception tolerated.
STRING_COORDINATE_CHECK = "check_coordinate_variables_strict_monotonicity"


def cf_failures(path: str | Path) -> tuple[list, list]:
    """Run cf:1.8 on ``path``: (failed high- and medium-priority checks with their messages,
    names of the checks that raised instead of reporting)."""
    from compliance_checker.runner import CheckSuite

    suite = CheckSuite()
    suite.load_all_available_checkers()
    ds = suite.load_dataset(str(path))
    try:
        groups, errors = suite.run_all(ds, ["cf:1.8"], skip_checks=[])["cf:1.8"]
    finally:
        ds.close()

    def failed(r):
        v = r.value
        return v[0] < v[1] if isinstance(v, tuple) else not v

    failures = [(r.name, r.msgs) for r in groups if r.weight >= 2 and failed(r)]
    raised = [name for name in errors if not name.endswith(STRING_COORDINATE_CHECK)]
    return failures, raised
