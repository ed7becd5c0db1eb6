"""`volrecon bench --lenslet` on a tiny case: the records, their ratios and the table.

No timing assertions: the figures are only checked to be finite, positive and consistent with
the seconds they are ratios of.
"""

from __future__ import annotations

import math

import pytest

from volrecon.bench import lenslet


@pytest.fixture(scope="module")
def records() -> list[dict[str, object]]:
    return lenslet.run([(2, 3, 18)], threads=1, methods=("fista",))


def test_ratios_are_the_measured_seconds_divided(records: list[dict[str, object]]) -> None:
    (r,) = records
    apply, coarse, bound = (float(r[k]) for k in  # type: ignore[arg-type]
                            ("apply_seconds", "coarse_transform_seconds", "fft_bound_seconds"))
    assert all(math.isfinite(x) and x > 0 for x in (apply, coarse, bound))
    assert r["apply_over_coarse"] == pytest.approx(apply / coarse)
    assert r["apply_over_fft_bound"] == pytest.approx(apply / bound)
    # N² strided convolutions per depth: N² times the Z + Z full-grid transforms of the bound
    assert r["apply_over_strided_transforms"] == pytest.approx(apply / (3**2 * bound))
    assert r["size_znyx"] == [2, 3, 18, 18]


def test_table_has_one_row_per_size(records: list[dict[str, object]]) -> None:
    lines = lenslet.report_lines(records)
    assert len(lines) == 2 + len(records)
    row = lines[-1].split()
    assert row[0] == "2,3,18,18"
    assert "fista" in lines[-1]
    assert float(row[7]) == pytest.approx(
        float(records[0]["apply_over_strided_transforms"]), abs=1e-3)  # type: ignore[arg-type]
