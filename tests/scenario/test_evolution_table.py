"""The [evolution] table: SI values, defaults, snapshot times and one-line errors."""

from __future__ import annotations

import pytest

from crustflow.errors import CrustflowInputError
from crustflow.scenario.evolution import parse_evolution

MYR = 1e6 * 365.25 * 86400  # Julian years (IAU); "Myr" parses through pint as megayear


def test_contract_keys_parse_to_si():
    spec = parse_evolution(
        {
            "duration": "2 Myr",
            "save_every": "0.5 Myr",
            "mode": "transient",
            "boundaries": {"west": "fixed", "east": "closed", "south": {"inflow": "300 m^2/yr"}},
        }
    )
    assert spec.duration == pytest.approx(2 * MYR)
    assert spec.snapshot_times == pytest.approx([0, 0.5 * MYR, MYR, 1.5 * MYR, 2 * MYR])
    assert spec.boundaries["west"].kind == "fixed"
    assert spec.boundaries["north"].kind == "closed"  # default
    assert spec.boundaries["south"].inflow == pytest.approx(300 / (365.25 * 86400))


def test_final_state_always_saved():
    spec = parse_evolution({"duration": "1 Myr", "save_every": "0.3 Myr"})
    assert spec.snapshot_times[-1] == pytest.approx(MYR)
    assert len(spec.snapshot_times) == 5
    assert parse_evolution({"duration": "0 Myr"}).snapshot_times == (0.0,)
    assert parse_evolution({"mode": "steady"}).mode == "steady"


@pytest.mark.parametrize(
    ("table", "message"),
    [
        ({"save_every": "1 Myr"}, "evolution.duration is required"),
        ({"duration": 2}, "has no units"),
        ({"duration": "2 km"}, "expected a time"),
        ({"duration": "2 Myr", "mode": "forward"}, "evolution.mode = 'forward' is not one of"),
        ({"duration": "2 Myr", "duraton": "1 Myr"}, "did you mean 'duration'"),
        ({"duration": "2 Myr", "boundaries": {"west": "open"}}, 'is not "closed", "fixed"'),
        ({"duration": "2 Myr", "boundaries": {"up": "fixed"}}, "unknown key 'up'"),
        (
            {"duration": "2 Myr", "boundaries": {"west": {"inflow": "3 m/yr"}}},
            "expected a flux such as",
        ),
        ({"duration": "2 Myr", "save_every": "-1 Myr"}, "must be positive"),
        ({"duration": "2 Myr", "save_every": "1 yr"}, "snapshots, more than"),
        ({"duration": "2 Myr", "tolerance": "0 m"}, "tolerance must be a positive length"),
    ],
)
def test_bad_tables_name_the_key_and_the_fix(table, message):
    with pytest.raises(CrustflowInputError, match=message):
        parse_evolution(table)
