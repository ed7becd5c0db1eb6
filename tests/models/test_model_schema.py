"""Saved model stores of every kind validate against schemas/psf-model.schema.json."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest
from jsonschema import Draft202012Validator

from volrecon.calibrate import calibrate_stack
from volrecon.models import (
    DepthConvolutionPSF,
    FieldVaryingPSF,
    Geometry,
    LensletPSF,
    LowRankDepthPSF,
)
from volrecon.models.store import model_kinds

SCHEMA = json.loads((Path(__file__).resolve().parents[2] / "schemas" /
                     "psf-model.schema.json").read_text())


def _bead_scan(rng, z=4, n=24):
    yy, xx = np.mgrid[:n, :n]
    psf = np.stack([np.exp(-((yy - n / 2) ** 2 + (xx - n / 2) ** 2) / (2 * (1.2 + 0.5 * i) ** 2))
                    for i in range(z)])
    return rng.poisson(2000 * psf / psf.sum(axis=(1, 2), keepdims=True) * 50 + 20)


def _models(rng):
    g = Geometry(2.0, 0.5, 1.0)
    scan = _bead_scan(rng)
    yield DepthConvolutionPSF(rng.random((3, 8, 8)), g)
    yield LowRankDepthPSF(rng.random((2, 8, 8)), rng.random((3, 2)), g)
    yield FieldVaryingPSF.from_positions(rng.random((3, 2, 8, 8)), [[1, 1], [6, 6]], g)
    yield FieldVaryingPSF(rng.random((3, 2, 8, 8)), rng.random((3, 2, 8, 8)), g)
    yield LensletPSF(rng.random((3, 2, 2, 8, 8)), g)
    yield calibrate_stack(scan, depth_step_um=2.0, pixel_size_um=0.4).model
    yield calibrate_stack(scan, depth_step_um=2.0, pixel_size_um=0.4, rank=2,
                          wavelength_nm=520.0, crop_yx=(2, 22, 2, 22)).model
    yield calibrate_stack(np.stack([scan, np.roll(scan, 3, axis=-1)]), depth_step_um=2.0,
                          pixel_size_um=0.4, positions_yx=[[12, 12], [12, 15]]).model


def test_schema_is_valid_2020_12_and_covers_every_kind():
    # Reference: the JSON Schema 2020-12 meta-schema, as shipped with jsonschema.
    Draft202012Validator.check_schema(SCHEMA)
    kinds = SCHEMA["$defs"]["model"]["properties"]["kind"]["enum"]
    assert sorted(kinds) == sorted(model_kinds())


def test_saved_stores_validate(rng, tmp_path):
    validator = Draft202012Validator(SCHEMA)
    seen = set()
    for i, model in enumerate(_models(rng)):
        if i % 2:  # stores with a cached norm (a number) and without (null)
            model.operator_norm_squared()
        model.save(tmp_path / f"m{i}.zarr")
        attributes = json.loads((tmp_path / f"m{i}.zarr" / "zarr.json").read_text())["attributes"]
        errors = [e.message for e in validator.iter_errors(attributes)]
        assert errors == [], (model.kind, errors)
        seen.add(model.kind)
    assert seen == set(model_kinds())


@pytest.mark.parametrize("change", [
    lambda a: a.update(kind="bead-magic"),
    lambda a: a.pop("depth_step_um"),
    lambda a: a.update(dtype="int16"),
    lambda a: a["parameters"].pop("rank"),
    lambda a: a["parameters"].update(extra=1),
    lambda a: a.update(shape_zyx=[3, 8]),
])
def test_broken_attributes_fail_validation(rng, tmp_path, change):
    model = LowRankDepthPSF(rng.random((2, 8, 8)), rng.random((3, 2)), Geometry(1.0, 1.0))
    model.save(tmp_path / "m.zarr")
    attributes = json.loads((tmp_path / "m.zarr" / "zarr.json").read_text())["attributes"]
    change(attributes["volrecon_model"])
    # Reference: jsonschema's 2020-12 validator must reject each corrupted store.
    assert list(Draft202012Validator(SCHEMA).iter_errors(attributes))
