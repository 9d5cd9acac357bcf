"""S-curve chart files (lshjob/report/charts.py): SVG and PNG written by matplotlib."""

from __future__ import annotations

import os
import re
import struct
import xml.etree.ElementTree as ET

import numpy as np
import pytest

from lshjob.errors import ParameterError
from lshjob.plan.banding import PairHistogram
from lshjob.report.charts import CURVE_ID, write_chart

SVG = "{http://www.w3.org/2000/svg}"


def curve_points(path) -> np.ndarray:
    """(x, y) of the vertices of the curve's path in the SVG, in the SVG's coordinates."""
    root = ET.parse(path).getroot()
    group = next(el for el in root.iter(f"{SVG}g") if el.get("id") == CURVE_ID)
    d = next(group.iter(f"{SVG}path")).get("d")
    return np.array([[float(a), float(b)] for a, b in re.findall(r"[ML]\s*([-\d.e]+)\s+([-\d.e]+)", d)])


@pytest.mark.parametrize("bands, rows", [(20, 5), (8, 12)])
def test_svg_parses_and_its_curve_is_one_minus_one_minus_s_to_the_r_to_the_b(tmp_path, bands, rows):
    # Oracle: xml.etree parses the file; the curve's vertices, put back on [0, 1] x [0, 1] by
    # their own extent (P(0) = 0, P(1) = 1), lie on 1 - (1 - s**r)**b (Mining of Massive
    # Datasets, section 3.4), computed here with numpy.
    path = write_chart(tmp_path / "curve.svg", bands, rows, 0.6)
    xy = curve_points(path)
    assert len(xy) >= 10
    s = (xy[:, 0] - xy[:, 0].min()) / np.ptp(xy[:, 0])
    p = (xy[:, 1].max() - xy[:, 1]) / np.ptp(xy[:, 1])  # SVG y grows downwards
    assert np.all(np.diff(s) >= 0)  # left to right (the simplified path may repeat its last vertex)
    np.testing.assert_allclose(p, 1 - (1 - s**rows) ** bands, atol=2e-3)


def test_the_same_plan_gives_the_same_svg_bytes(tmp_path):
    # Oracle: byte comparison of two files written apart (one with a histogram in between).
    hist = PairHistogram(similarity=np.array([0.1, 0.5, 0.9]), counts=np.array([1000.0, 30.0, 2.0]),
                         sample_entities=100, total_entities=100)
    a = write_chart(tmp_path / "a.svg", 20, 5, 0.6, hist)
    write_chart(tmp_path / "other.svg", 10, 3, 0.4)
    b = write_chart(tmp_path / "b.svg", 20, 5, 0.6, hist)
    assert a.read_bytes() == b.read_bytes()
    assert b"<dc:date>" not in a.read_bytes()


@pytest.mark.parametrize("size", [(680, 400), (300, 200)])
def test_png_has_the_signature_and_the_asked_size(tmp_path, size):
    # Oracle: the PNG signature and the IHDR width and height (PNG specification, section 11.2.2),
    # read here with struct; and matplotlib's own reader agrees.
    path = write_chart(tmp_path / "curve.png", 20, 5, 0.6, size=size)
    data = path.read_bytes()
    assert data[:8] == b"\x89PNG\r\n\x1a\n" and data[12:16] == b"IHDR"
    assert struct.unpack(">II", data[16:24]) == size
    import matplotlib.image

    assert matplotlib.image.imread(path).shape[:2] == (size[1], size[0])


def test_a_chart_of_another_kind_is_refused_and_nothing_is_written(tmp_path):
    # Oracle: os.listdir before/after.
    with pytest.raises(ParameterError, match=r"--chart must end in \.svg or \.png; got 'curve\.pdf'"):
        write_chart(tmp_path / "curve.pdf", 20, 5, 0.6)
    assert os.listdir(tmp_path) == []
