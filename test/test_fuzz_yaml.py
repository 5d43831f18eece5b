"""Fuzz the YAML parsers (joint and mechanism parameters) with hypothesis.

Every input, however malformed, must end in a validated record or one of our named exceptions
(InvalidInputError), never another exception, a crash or a hang.
"""

from __future__ import annotations

import math
from pathlib import Path

import pytest
import yaml
from hypothesis import given
from hypothesis import strategies as st
from reliability_support import (
    FUZZ_SETTINGS,
    JUNK_SCALARS,
    count_case,
    fuzz_file,
    mutated_tree,
    no_hang,
)

from compliant_demo.exceptions import CompliantDemoError, InvalidInputError
from compliant_demo.models import (
    AntagonisticParams,
    IdealImpedanceParams,
    JointParams,
    load_yaml_model,
)

PARAMETER_MODELS = (JointParams, IdealImpedanceParams, AntagonisticParams)
FIELD_NAMES = sorted({name for model in PARAMETER_MODELS for name in model.model_fields})

_scalars = st.one_of(
    JUNK_SCALARS,
    st.sampled_from(["ideal", "antagonistic", "shoulder", "elbow", "1e400", "-.inf", "0x1F"]),
)
_values = st.recursive(
    _scalars,
    lambda inner: (
        st.lists(inner, max_size=4) | st.dictionaries(st.text(max_size=8), inner, max_size=4)
    ),
    max_leaves=12,
)
_mappings = st.dictionaries(
    st.sampled_from(FIELD_NAMES) | st.text(max_size=12), _values, max_size=len(FIELD_NAMES) + 2
)


def _mutate(document: bytes, edits: list[tuple[int, int]]) -> bytes:
    """Overwrite bytes of ``document`` at the given (position, byte) pairs."""
    data = bytearray(document)
    for position, byte in edits:
        if data:
            data[position % len(data)] = byte
    return bytes(data)


_valid_documents = st.sampled_from(
    [yaml.safe_dump(model().model_dump()).encode() for model in PARAMETER_MODELS]
)
yaml_documents = st.one_of(
    st.binary(max_size=300),
    st.text(max_size=300).map(lambda text: text.encode("utf-8", "surrogatepass")),
    _mappings.map(lambda mapping: yaml.safe_dump(mapping, allow_unicode=True).encode()),
    st.builds(
        _mutate,
        _valid_documents,
        st.lists(st.tuples(st.integers(0, 10_000), st.integers(0, 255)), min_size=1, max_size=6),
    ),
)


def _check_parameter_yaml(document: bytes, model: type, key: str | None) -> None:
    with fuzz_file("params.yaml", document) as path:
        with no_hang(5.0):
            try:
                record = load_yaml_model(model, path, key=key)
            except InvalidInputError as exc:
                assert "params.yaml" in str(exc), f"error does not name the file: {exc}"
            else:
                assert isinstance(record, model)
                for name, value in record.model_dump().items():
                    if isinstance(value, float):
                        assert math.isfinite(value), f"{name} = {value} passed validation"
    count_case("parameter_yaml")


@FUZZ_SETTINGS
@given(document=yaml_documents, model=st.sampled_from(PARAMETER_MODELS), nested=st.booleans())
def test_fuzz_parameter_yaml(document: bytes, model: type, nested: bool) -> None:
    _check_parameter_yaml(document, model, "joint" if nested else None)


@pytest.mark.parametrize(
    "document, match",
    [
        (b"name: \xff\xfe\n", r"params\.yaml.*(utf-8|UTF-8|decode|encoding)"),
        (b"[" * 3000 + b"]" * 3000, r"params\.yaml.*(nest|deep|recursion)"),
        (b"inertia: 1" + b"0" * 5000 + b"\n", r"params\.yaml.*(integer|digits)"),
    ],
    ids=["invalid_utf8", "deep_nesting", "huge_integer"],
)
def test_parameter_yaml_malformed_file_is_a_named_error(
    tmp_path: Path, document: bytes, match: str
) -> None:
    # Found by the fuzzer: these leaked UnicodeDecodeError, RecursionError and a bare ValueError.
    path = tmp_path / "params.yaml"
    path.write_bytes(document)
    with pytest.raises(CompliantDemoError, match=match):
        load_yaml_model(JointParams, path)


# -- perturbation schedules and campaigns --------------------------------------------------------

CONFIG = Path(__file__).resolve().parent.parent / "config"
_PERTURBATION_FILES = {
    "schedules": CONFIG / "perturbations_cork_seat.yaml",
    "campaign": CONFIG / "perturbations_campaign.yaml",
}


_leaf_junk = st.one_of(
    _scalars,
    st.sampled_from([-1, 0, 1e-300, 1e300, -0.0, 2**63, "impulse", "wall", "hold", "uniform",
                     "log_uniform", "normal", "choice", "fixed", [], {}, [0, 1], {"low": 1}]),
)  # fmt: skip


def _check_perturbation_yaml(document: bytes, which: str) -> None:
    from compliant_demo.perturbation import (
        CampaignSpec,
        PerturbationSchedule,
        draw_scenarios,
        load_campaign_yaml,
        load_schedules_yaml,
    )

    with fuzz_file("perturbations.yaml", document) as path:
        with no_hang(10.0):
            try:
                if which == "campaign":
                    spec = load_campaign_yaml(path)
                    assert isinstance(spec, CampaignSpec)
                    schedules = draw_scenarios(spec, 3, seed=7)
                else:
                    schedules = load_schedules_yaml(path)
            except InvalidInputError as exc:
                assert "perturbations.yaml" in str(exc) or which == "campaign", str(exc)
            else:
                assert all(isinstance(s, PerturbationSchedule) for s in schedules)
    count_case(f"perturbation_{which}_yaml")


@FUZZ_SETTINGS
@given(data=st.data(), which=st.sampled_from(sorted(_PERTURBATION_FILES)), raw=st.booleans())
def test_fuzz_perturbation_yaml(data: st.DataObject, which: str, raw: bool) -> None:
    original = _PERTURBATION_FILES[which].read_bytes()
    if raw:
        document = data.draw(
            st.builds(
                _mutate,
                st.just(original),
                st.lists(st.tuples(st.integers(0, 10_000), st.integers(0, 255)), min_size=1,
                         max_size=6),
            )  # fmt: skip
        )
    else:
        tree = data.draw(mutated_tree(yaml.safe_load(original), _leaf_junk))
        document = yaml.safe_dump(tree, allow_unicode=True).encode()
    _check_perturbation_yaml(document, which)


@pytest.mark.parametrize("which", sorted(_PERTURBATION_FILES))
def test_perturbation_fuzzer_starts_from_valid_files(which: str) -> None:
    # The mutations start from files that load; otherwise the fuzz test would prove nothing.
    from compliant_demo.perturbation import draw_scenarios, load_campaign_yaml, load_schedules_yaml

    path = _PERTURBATION_FILES[which]
    if which == "campaign":
        assert len(draw_scenarios(load_campaign_yaml(path), 3, seed=7)) == 3
    else:
        assert len(load_schedules_yaml(path)) >= 3
