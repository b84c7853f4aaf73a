"""Odd files read right or refused with one InputError: column orders, line ends, encodings,
hostile case-file values, and a seeded fuzz of both readers."""

from __future__ import annotations

import warnings

import numpy as np
import pytest

from fibers import pipeline
from fibers.demo import ventricle
from fibers.errors import InputError
from fibers.io.case import parse_case, resolve_case
from fibers.io.contours import parse_contours, write_contours

GOOD_CASE = ('[input]\ncontours = "contours.csv"\n[mesh]\nsize = 4.0\nmax_tets = 100000\n'
             '[landmarks]\nrv_insertion_anterior = [1.0, 2.0, 3.0]\nrv_insertion_inferior = [4.0, 5.0, 6.0]\n'
             '[fibers]\nhelix_endo = 60.0\nhelix_profile = [[0.0, 60.0], [1.0, -60.0]]\n'
             '[pools]\nmyocardium = 1000\nseed = 3\nsampler = "sobol"\n')


@pytest.fixture(scope="module")
def good_csv(tmp_path_factory):
    contours, _ = ventricle.spheroid_shell(seed=1).sample_stack(spacing=8.0, seed=0)
    path = tmp_path_factory.mktemp("csv") / "contours.csv"
    write_contours(path, contours)
    return path.read_text()


def _reorder(text, order):
    rows = [r.split(",") for r in text.strip().split("\n")]
    return "\n".join(",".join(r[i] for i in order) for r in rows) + "\n"


def test_columns_by_name_build_the_same_heart(good_csv):
    # the header structure,slice,y,x,z with its data in that order is the same ventricle, not
    # its mirror image (reading by position swapped x and y)
    normal = parse_contours(good_csv.encode())
    swapped = parse_contours(_reorder(good_csv, (0, 1, 3, 2, 4)).encode())
    np.testing.assert_array_equal(swapped.points, normal.points)
    case = resolve_case({"input": {"contours": "contours.csv"}, "mesh": {"size": 4.0},
                         "pools": {k: 0 for k in ("myocardium", "cavity", "background", "endo", "epi", "base")}})
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        a, b = pipeline.run(normal, case), pipeline.run(swapped, case)
    np.testing.assert_array_equal(a.mesh.points, b.mesh.points)
    assert a.summary["myocardial_volume_ml"] == b.summary["myocardial_volume_ml"]


@pytest.mark.parametrize("transform", [
    lambda t: t.replace("\n", "\r"),            # old Mac line ends
    lambda t: t.replace("\n", "\r\n"),          # Windows
    lambda t: "\ufeff" + t,                     # byte-order mark
    lambda t: t.replace(",", ", "),             # spaces after commas
    lambda t: _reorder(t, (4, 3, 2, 1, 0)),     # every column in reverse order
])
def test_line_ends_and_orders_read_the_same(good_csv, transform):
    expected = parse_contours(good_csv.encode())
    got = parse_contours(transform(good_csv).encode())
    np.testing.assert_array_equal(got.points, expected.points)
    np.testing.assert_array_equal(got.slice_id, expected.slice_id)


def test_utf16_export_reads_the_same(good_csv):
    got = parse_contours(good_csv.encode("utf-16"))
    np.testing.assert_array_equal(got.points, parse_contours(good_csv.encode()).points)


def test_extra_columns_ignored_with_a_warning(good_csv):
    rows = good_csv.strip().split("\n")
    text = "id," + rows[0] + ",note\n" + "\n".join(f"{i},{r},x" for i, r in enumerate(rows[1:])) + "\n"
    with pytest.warns(UserWarning, match=r"2 column\(s\) not used and ignored \('id', 'note'\)"):
        got = parse_contours(text.encode())
    np.testing.assert_array_equal(got.points, parse_contours(good_csv.encode()).points)


@pytest.mark.parametrize("text, expected", [
    ("structure,slice,x,z\nendo,0,1,2\n", "missing column(s) y"),
    ("structure,slice,x,y,z,x\nendo,0,1,2,3,4\n", "column 'x' appears twice"),
    ("structure,slice,x,y,z\nendo,0,32_169,2,3\n", "x = '32_169' is not a number"),
    ("structure,slice,x,y,z\nendo,1e300,1,2,3\n", "must be an integer slice id"),
    ("structure,slice,x,y,z\nendo,0,1e9,2,3\n", "more than 100 m"),
    ("structure,slice,x,y,z\nendo,0,1" + "0" * 200_000 + ",2,3\n", "not a readable CSV row"),
])
def test_odd_cells_refused(text, expected):
    with pytest.raises(InputError) as err:
        parse_contours(text.encode())
    assert expected in str(err.value)


def test_a_file_that_is_not_contours_is_never_quoted():
    secret = b"Patient: Jane Doe, born 1970-01-01\nMRN 123456\n"
    with pytest.raises(InputError) as err:
        parse_contours(secret, "notes.txt")
    assert "Jane" not in str(err.value) and "123456" not in str(err.value)
    assert "does not look like a contours CSV" in str(err.value)


@pytest.mark.parametrize("text, expected", [
    ("[pools]\nseed = 18446744073709551616\n", "must lie between 0 and 9,223,372,036,854,775,807"),
    ("[pools]\nseed = " + "7" * 5000 + "\n", "thousands of digits"),
    ("x = " + "[" * 5000 + "]" * 5000 + "\n", "nested hundreds deep"),
    ("x = " + "{a=" * 2000 + "1" + "}" * 2000 + "\n", "nested hundreds deep"),
    ("[landmarks]\nrv_insertion_anterior = [" + "9" * 400 + ", 1, 1]\nrv_insertion_inferior = [1, 2, 3]\n",
     "within 100000 mm"),
    ("[mesh]\nsize = nan\n", "must lie between 0.3 and 10"),
    ("[mesh]\n" + "k" * 10_000 + " = 1\n", "unknown key 'kkkk"),
])
def test_hostile_case_values_refused_in_one_line(text, expected):
    with pytest.raises(InputError) as err:
        parse_case(('[input]\ncontours = "contours.csv"\n' + text).encode())
    message = str(err.value)
    assert expected in message and "\n" not in message and len(message) < 400


def test_nul_byte_and_symlink_loop_in_paths(tmp_path):
    with pytest.raises(InputError, match="NUL byte"):
        parse_case(b'[input]\ncontours = "a\\u0000b.csv"\n', base=tmp_path)
    (tmp_path / "loop1").symlink_to(tmp_path / "loop2")
    (tmp_path / "loop2").symlink_to(tmp_path / "loop1")
    with pytest.raises(InputError, match="loop"):
        parse_case(b'[input]\ncontours = "loop1"\n', base=tmp_path)


def test_pool_count_zero_means_no_pool(good_csv):
    case = resolve_case({"input": {"contours": "contours.csv"}, "mesh": {"size": 4.0},
                         "pools": {"myocardium": 50, "cavity": 0, "background": 0, "endo": 0, "epi": 5, "base": 0}})
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        result = pipeline.run(parse_contours(good_csv.encode()), case)
    assert sorted(result.pools) == ["epi", "myocardium"]
    assert result.summary["counts"]["pools"] == {"myocardium": 50, "epi": 5}


# -- fuzz: random byte mutations never raise anything but InputError -------------------------

_SPICE = [b"\r", b"\n", b"\x00", b",", b'"', b"\xff", b"\xfe", b"-", b"e", b"9", b"[", b"]", b"{",
          b"=", b".", b"nan", b"inf", b"\\u0000", b"\t", b" ", b"#", b"'", "\ufeff".encode()]


def _mutate(data: bytes, rng: np.random.Generator) -> bytes:
    data = bytearray(data)
    for _ in range(int(rng.integers(1, 6))):
        kind = rng.integers(5)
        at = int(rng.integers(len(data) + 1))
        if kind == 0 and data:                                  # flip one byte
            data[min(at, len(data) - 1)] = int(rng.integers(256))
        elif kind == 1:                                         # insert a troublesome token
            data[at:at] = _SPICE[int(rng.integers(len(_SPICE)))]
        elif kind == 2:                                         # delete a run
            del data[at:at + int(rng.integers(1, 40))]
        elif kind == 3:                                         # repeat a run
            data[at:at] = data[at:at + int(rng.integers(1, 80))] * int(rng.integers(1, 50))
        else:                                                   # cut the file short
            del data[at:]
    return bytes(data)


def test_fuzz_contours_reader(good_csv):
    rows = good_csv.split("\n")
    small = ("\n".join(rows[:300]) + "\n").encode()  # a few slices: fast to parse thousands of times
    rng = np.random.default_rng(20261201)
    outcomes = {"read": 0, "refused": 0}
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        for _ in range(3000):
            try:
                parse_contours(_mutate(small, rng))
                outcomes["read"] += 1
            except InputError as err:
                assert "\n" not in str(err)
                outcomes["refused"] += 1
    assert outcomes["read"] > 100 and outcomes["refused"] > 100  # both paths were exercised


def test_fuzz_case_reader(tmp_path):
    (tmp_path / "contours.csv").write_text("structure,slice,x,y,z\n")
    rng = np.random.default_rng(7)
    outcomes = {"read": 0, "refused": 0}
    for _ in range(3000):
        try:
            parse_case(_mutate(GOOD_CASE.encode(), rng), base=tmp_path)
            outcomes["read"] += 1
        except InputError as err:
            assert "\n" not in str(err)
            outcomes["refused"] += 1
    assert outcomes["read"] > 20 and outcomes["refused"] > 1000  # TOML is strict: most mutations are refused


def test_one_slice_in_centimetres_is_named(good_csv):
    from fibers import stack

    c = parse_contours(good_csv.encode())
    ids = np.unique(c.slice_id)
    points = c.points.copy()
    points[c.slice_id == ids[3]] /= 10.0  # that one slice exported in cm
    odd = type(c)(structure=c.structure, slice_id=c.slice_id, points=points, line=c.line, source=c.source)
    with pytest.raises(InputError, match=rf"slice {ids[3]}: .*looks like centimetres"):
        stack.check_stack(odd, align_slices=True)
