"""Intake refuses every malformed input with the file, line and field named."""

import numpy as np
import pytest

from analysis.cbt.simulate import simulate_sweep
from service.intake import IntakeError, check_cbt_sweep, conductance_from_iv, load_files, parse_csv


def sweep_text(n=60, header="bias_V,conductance_S", meta="# junctions_in_series: 33\n", rows=None):
    bias, g, _ = simulate_sweep(33, 0.05, 0.01, 3e-6, seed=1, points=n)
    body = rows if rows is not None else "".join(f"{v:.8e},{c:.8e}\n" for v, c in zip(bias, g, strict=True))
    return (meta + header + "\n" + body).encode()


def refuse(content: bytes, name="s.csv", **expect):
    with pytest.raises(IntakeError) as exc:
        load_files({name: content})
    err = exc.value
    for key, value in expect.items():
        assert getattr(err, key) == value, (key, err.describe())
    assert err.file == name or expect.get("file") is None
    return err


def test_minimal_form_is_accepted():
    run = load_files({"s.csv": sweep_text()})
    assert run.kind == "cbt_thermometry"
    f = run.files[0]
    assert f.metadata == {"junctions_in_series": 33}
    assert f.rows == 60 and f.header_line == 2 and f.first_data_line == 3
    assert len(f.sha256) == 64


def test_missing_conductance_column():
    err = refuse(sweep_text(header="bias_V,resistance_ohm"), field="conductance_S", line=2)
    assert "conductance_S" in err.message


def test_unitless_column():
    refuse(sweep_text(header="bias,conductance_S"), field="bias", line=2)


def test_non_numeric_cell():
    rows = "".join(f"{i * 1e-5},3e-6\n" for i in range(40)) + "0.5,abc\n"
    err = refuse(sweep_text(rows=rows), field="conductance_S", line=43)
    assert "abc" in err.message


@pytest.mark.parametrize("bad", ["nan", "inf", "-inf"])
def test_nan_and_inf(bad):
    rows = "".join(f"{i * 1e-5},3e-6\n" for i in range(40)) + f"{bad},3e-6\n"
    refuse(sweep_text(rows=rows), field="bias_V", line=43)


def test_repeated_bias():
    rows = "".join(f"{i * 1e-5},3e-6\n" for i in range(40)) + "1e-5,3.1e-6\n"
    err = refuse(sweep_text(rows=rows), field="bias_V", line=43)
    assert "more than once" in err.message


def test_too_few_points():
    err = refuse(sweep_text(n=20))
    assert "at least 30" in err.message


def test_non_positive_conductance():
    rows = "".join(f"{i * 1e-5},3e-6\n" for i in range(40)) + "1e-3,-1e-9\n"
    refuse(sweep_text(rows=rows), field="conductance_S", line=43)


def test_junction_count_below_two():
    refuse(sweep_text(meta="# junctions_in_series: 1\n"), field="junctions_in_series", line=1)


def test_junction_count_missing():
    refuse(sweep_text(meta="# parallel_rows: 2\n"), field="junctions_in_series")


def test_typo_key():
    err = refuse(sweep_text(meta="# junctions_in_series: 33\n# excitation_rms_v: 1e-6\n"), field="excitation_rms_v", line=2)
    assert "excitation_rms_V" in err.message


def test_unrelated_unknown_key_is_refused():
    # Intake's table holds every kind's keys; a key none knows is a mistake, not free text.
    # Remarks go in '# note:'.
    err = refuse(sweep_text(meta="# junctions_in_series: 33\n# cryostat: Blue fridge 2\n"),
                 field="cryostat", line=2)
    assert "note" in err.message
    run = load_files({"s.csv": sweep_text(meta="# junctions_in_series: 33\n# note: Blue fridge 2\n")})
    assert run.files[0].metadata["note"] == "Blue fridge 2"


def test_empty_and_binary_files():
    refuse(b"", name="e.csv")
    refuse(b"\x89PNG\r\n\x1a\n\x00\x00", name="b.csv")


def test_wrong_number_of_cells():
    rows = "".join(f"{i * 1e-5},3e-6\n" for i in range(40)) + "1,2,3\n"
    refuse(sweep_text(rows=rows), line=43)


def test_bad_manifest():
    with pytest.raises(IntakeError) as exc:
        load_files({"s.csv": sweep_text(), "run.toml": b"[lab]\nname='x'\n"})
    assert exc.value.file == "run.toml" and exc.value.field == "[lab]"
    with pytest.raises(IntakeError) as exc:
        load_files({"s.csv": sweep_text(), "run.toml": b"[run]\nseed = -3\n"})
    assert exc.value.field == "run.seed"


def test_dc_iv_is_differentiated():
    # numpy.gradient's second-order scheme is exact for quadratics (Fornberg 1988), also on an
    # uneven grid: I = a V + b V^2 -> dI/dV = a + 2 b V.
    v = np.sort(np.random.default_rng(2).uniform(-1e-3, 1e-3, 80))
    i = 3e-6 * v + 2e-4 * v**2
    np.testing.assert_allclose(conductance_from_iv(v, i), 3e-6 + 4e-4 * v, rtol=1e-9)
    text = "# junctions_in_series: 10\nbias_V,current_A\n" + "".join(f"{float(a)!r},{float(c)!r}\n" for a, c in zip(v, i, strict=True))
    f = parse_csv("iv.csv", text.encode())
    _, g = check_cbt_sweep(f)
    np.testing.assert_allclose(g, 3e-6 + 4e-4 * v, rtol=1e-9)


# Header messages name what is actually wrong (one test per message).


@pytest.mark.parametrize(("sep", "called"), [(";", "semicolons"), ("\t", "tabs")])
def test_other_separators_are_named(sep, called):
    text = sweep_text().decode().replace(",", sep)
    err = refuse(text.encode(), line=2)
    assert called in err.message and "comma-separated" in err.message


def test_missing_header_line_is_named():
    text = sweep_text().decode().split("\n", 2)
    no_header = (text[0] + "\n" + text[2]).encode()
    err = refuse(no_header, line=2)
    assert "no header line" in err.message and "bias_V,conductance_S" in err.message


def test_prefixed_unit_is_refused_with_the_unprefixed_name():
    err = refuse(sweep_text(header="bias_mV,conductance_S"), field="bias_mV", line=2)
    assert "'mV' has an SI prefix" in err.message and "bias_V" in err.message
    assert "must end in an SI unit" not in err.message


def test_a_name_that_ends_in_a_unit_is_accepted_and_the_missing_column_named():
    # G_S ends in a unit, so the header is fine; the sweep check then says which column it needs.
    err = refuse(sweep_text(header="bias_V,G_S"), field="conductance_S", line=2)
    assert "must end in an SI unit" not in err.message
    assert "conductance_S" in err.message and "found bias_V, G_S" in err.message
