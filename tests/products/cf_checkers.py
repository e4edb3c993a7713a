"""Run the two general-purpose CF checkers offline, in-process (test helper, also a script).

* IOOS ``compliance-checker`` (PyPI ``compliance-checker``): the ``cf`` suite at the newest CF
  version it ships and ``acdd:1.3``; it reads the CF standard-name table bundled in its own
  package data (``compliance_checker/data/cf-standard-name-table.xml``), so it needs no network.
* ``cfchecker`` (PyPI ``cfchecker``, the checker behind the CF web validator): given the same
  bundled standard-name table by path (its ``cfStandardNamesXML`` argument, ``-s`` on its command
  line).  It needs the UDUNITS-2 C library through ``cfunits``; when the system has none, the
  copy bundled in the ``cf_units`` wheel (a compliance-checker dependency) and that wheel's XML
  unit database are used.  cfchecker also downloads the CF area-type and standardized-region
  tables, which no installed package ships; they are consulted only for variables whose
  standard_name is ``area_type`` or ``region``, so offline they are left empty and
  :func:`cfchecker_messages` refuses to check a file that has such a variable (nothing is faked).

``python tests/products/cf_checkers.py FILE.nc ...`` prints both checkers' scores and failures.
"""

from __future__ import annotations

import contextlib
import ctypes.util
import glob
import io
import os
import sys
from pathlib import Path


def _bundled_udunits() -> tuple[str | None, str | None]:
    """(library path, XML database path) of the UDUNITS-2 copy inside the cf_units wheel."""
    import cf_units

    site = Path(cf_units.__file__).resolve().parent
    libs = sorted(glob.glob(str(site.parent / "cf_units.libs" / "libudunits2*.so*")))
    xml = site / "etc" / "share" / "udunits2.xml"
    return (libs[0] if libs else None), (str(xml) if xml.exists() else None)


def _import_cfchecks():
    """Import cfchecker.cfchecks, pointing cfunits at the bundled UDUNITS-2 when the system has none."""
    if "cfchecker.cfchecks" in sys.modules:
        return sys.modules["cfchecker.cfchecks"]
    if ctypes.util.find_library("udunits2") is None:
        library, database = _bundled_udunits()
        real = ctypes.util.find_library
        ctypes.util.find_library = lambda name: library if name == "udunits2" else real(name)
        if database and "UDUNITS2_XML_PATH" not in os.environ:
            os.environ["UDUNITS2_XML_PATH"] = database
        try:
            from cfchecker import cfchecks
        finally:
            ctypes.util.find_library = real
        return cfchecks
    from cfchecker import cfchecks
    return cfchecks


def standard_name_table() -> str:
    """Path of the CF standard-name table shipped inside the compliance-checker package."""
    import compliance_checker

    path = Path(compliance_checker.__file__).resolve().parent / "data" / "cf-standard-name-table.xml"
    if not path.exists():
        raise FileNotFoundError(f"{path}: compliance-checker's bundled standard-name table is missing")
    return str(path)


class _OfflineTables:
    """A SAX parser factory that parses local files and leaves the two remote lookup tables empty."""

    def __init__(self, make_parser):
        self.make_parser = make_parser

    def __call__(self):
        parser = self.make_parser()
        parse = parser.parse

        def offline_parse(source):
            if isinstance(source, str) and source.startswith(("http://", "https://")):
                handler = parser.getContentHandler()
                handler.version_number, handler.last_modified = "not loaded (offline)", "n/a"
                return None
            return parse(source)

        parser.parse = offline_parse
        return parser


def cfchecker_messages(path) -> dict[str, list[str]]:
    """cfchecker's results for ``path``: {"FATAL", "ERROR", "WARN", "INFO"} → messages (global and per variable)."""
    import netCDF4

    with netCDF4.Dataset(path) as ds:
        for name, var in ds.variables.items():
            if getattr(var, "standard_name", "") in ("area_type", "region"):
                raise ValueError(f"{path}: variable {name} needs the CF area-type/region tables (not offline)")
    cfchecks = _import_cfchecks()
    checker = cfchecks.CFChecker(cfStandardNamesXML=standard_name_table(), version=cfchecks.CFVersion(),
                                 silent=True)
    original = cfchecks.make_parser
    cfchecks.make_parser = _OfflineTables(original)
    try:
        with contextlib.redirect_stdout(io.StringIO()):
            checker.checker(str(path))
    finally:
        cfchecks.make_parser = original
    return _collect(checker.all_results[str(path)])


def _collect(results: dict) -> dict[str, list[str]]:
    out: dict[str, list[str]] = {"FATAL": [], "ERROR": [], "WARN": [], "INFO": []}
    scopes = [("global", results.get("global", {}))] + list(results.get("variables", {}).items())
    for scope, categories in scopes:
        for category in out:
            out[category] += [f"{scope}: {message}" for message in categories.get(category, [])]
    return out


def compliance_results(path, suite: str) -> dict:
    """compliance-checker's JSON result of one suite (e.g. ``cf:1.11``, ``acdd:1.3``) for ``path``.

    Returns {"scored": int, "possible": int, "high": [...], "medium": [...], "low": [...], "errors": {...}}
    where each list holds (check name, messages) of the checks that lost points and ``errors`` the
    checks that raised inside the checker.
    """
    from compliance_checker.runner import CheckSuite

    suite_runner = CheckSuite()
    suite_runner.load_all_available_checkers()
    dataset = suite_runner.load_dataset(str(path))
    try:
        results = suite_runner.run_all(dataset, [suite], skip_checks=[])
    finally:
        with contextlib.suppress(Exception):
            dataset.close()
    name = next(iter(results))
    groups, errors = results[name]
    summary = suite_runner.build_structure(name, groups, str(path))
    lost = {level: [(r.name, list(r.msgs)) for r in summary[f"{level}_priorities"] if r.value[0] < r.value[1]]
            for level in ("high", "medium", "low")}
    scored, possible = summary["scored_points"], summary["possible_points"]
    return {"scored": scored, "possible": possible, **lost, "errors": {k: str(v[0]) for k, v in errors.items()}}


def newest_cf_suite() -> str:
    """The newest ``cf:X.Y`` suite this compliance-checker offers."""
    from compliance_checker.runner import CheckSuite

    CheckSuite.load_all_available_checkers()
    names = [n for n in CheckSuite.checkers if n.startswith("cf:") and n.count(".") == 1]
    return max(names, key=lambda n: tuple(int(p) for p in n[3:].split(".")))


if __name__ == "__main__":
    for file in sys.argv[1:]:
        for suite in (newest_cf_suite(), "cf:1.8", "acdd:1.3"):
            res = compliance_results(file, suite)
            print(f"{file} compliance-checker {suite}: {res['scored']}/{res['possible']}; "
                  f"lost high {len(res['high'])}, medium {len(res['medium'])}, low {len(res['low'])}; "
                  f"checker exceptions {len(res['errors'])}")
            for level in ("high", "medium"):
                for check, msgs in res[level]:
                    print(f"   {level}: {check}: {msgs[:3]}")
            for check, err in res["errors"].items():
                print(f"   exception: {check}: {err}")
        try:
            msgs = cfchecker_messages(file)
            print(f"{file} cfchecker: " + ", ".join(f"{k} {len(v)}" for k, v in msgs.items()))
            for category in ("FATAL", "ERROR", "WARN"):
                for m in msgs[category]:
                    print(f"   {category}: {m}")
        except Exception as err:  # report a checker crash as the measurement it is
            print(f"{file} cfchecker: CRASHED {type(err).__name__}: {err}")
