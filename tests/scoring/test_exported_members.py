"""The scoring core's public list is complete and the core never imports Flask or a database."""

from __future__ import annotations

import subprocess
import sys

import service.scoring


def test_every_public_name_is_importable() -> None:
    for name in service.scoring.__all__:
        assert hasattr(service.scoring, name), name
    assert sorted(service.scoring.__all__) == sorted(set(service.scoring.__all__))


def test_verdict_names_are_exported() -> None:
    """Pipelines and the service import gates and verdicts from the core's top level."""
    from service.scoring import verdict

    for name in (
        "BoundGate",
        "CompareGate",
        "ComparisonPlan",
        "FlagGate",
        "Gate",
        "GateReason",
        "GateSpecError",
        "Verdict",
        "compare_for_gate",
        "evaluate_gates",
        "parse_gates",
        "plan_comparison",
    ):
        assert name in service.scoring.__all__, name
        assert getattr(service.scoring, name) is getattr(verdict, name)


def test_core_imports_no_web_or_database_module() -> None:
    code = (
        "import sys, service.scoring; "
        "bad = [m for m in ('flask', 'sqlalchemy', 'psycopg', 'werkzeug', 'marshmallow') "
        "if m in sys.modules]; print(','.join(bad))"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == ""
