"""The markup builder and the SVG plotter: escaping, round-number ticks, coordinates."""

from __future__ import annotations

import math
import xml.etree.ElementTree as ET

from hypothesis import given
from hypothesis import strategies as st

from server.web.markup import Safe, el, esc
from server.web.svg import Plot, nice_step, nice_ticks, tick_texts

SVG = "{http://www.w3.org/2000/svg}"


def test_text_and_attributes_are_escaped():
    assert el("p", '<a href="x">&') == "<p>&lt;a href=&quot;x&quot;&gt;&amp;</p>"
    assert el("a", "x", href='"><script>') == '<a href="&quot;&gt;&lt;script&gt;">x</a>'
    assert el("b", Safe("<i>kept</i>")) == "<b><i>kept</i></b>"
    assert el("input", type="checkbox", checked=True, hidden=False) == '<input type="checkbox" checked>'
    assert el("div", None, ["a", ["b"]], class_="x", data_box="y") == '<div class="x" data-box="y">ab</div>'
    assert esc("it's") == "it&#x27;s"


# Characters XML allows (control characters other than tab and newline never are, escaped
# or not), with the ones that need escaping made likely.
XML_TEXT = st.text(
    st.characters(exclude_categories=("Cs", "Cc"), exclude_characters="\ufffe\uffff") | st.sampled_from("\t\n<>&\"'")
)


@given(XML_TEXT)
def test_any_text_survives_a_round_trip_through_an_xml_parser(text):
    # the standard library's XML parser is the outside reference for well-formed escaping
    node = ET.fromstring(el("p", text, title=text))
    assert (node.text or "") == text
    assert node.get("title") == text.replace("\t", " ").replace("\n", " ")  # XML attribute
    # value normalisation turns tab and newline into spaces (XML 1.0, section 3.3.3)


def test_nice_steps_are_one_two_or_five_times_a_power_of_ten():
    # Heckbert (1990), "Nice numbers for graph labels": steps of 1, 2, 5 (here also 2.5) x 10^k
    assert nice_step(97, 5) == 20
    assert nice_step(1.0, 4) == 0.25
    assert nice_step(12, 8) == 2
    assert nice_ticks(0, 97, 5) == [0, 20, 40, 60, 80]
    assert nice_ticks(0, 1, 4) == [0, 0.25, 0.5, 0.75, 1.0]
    assert nice_ticks(0.5, 7.5, 8, whole=True) == [1, 2, 3, 4, 5, 6, 7]
    assert tick_texts([0, 0.25, 0.5, 0.75, 1.0]) == ["0.00", "0.25", "0.50", "0.75", "1.00"]
    assert tick_texts([0, 20, 40]) == ["0", "20", "40"]
    assert tick_texts([0.0, 0.1, 0.2]) == ["0.0", "0.1", "0.2"]


def test_rule_labels_do_not_overlap():
    plot = Plot((0, 10), (0, 1), title="t")
    plot.rules([1.0, 1.1, 1.2, 1.3, 6.0], ["streak_backstop"] * 4 + ["learned"], "rulefire")
    root = ET.fromstring(plot.render())
    group = next(g for g in root.iter(SVG + "g") if g.get("class") == "vr rulefire")
    lines = list(group.iter(SVG + "line"))
    labels = [(float(t.get("x")), float(t.get("y"))) for t in group.iter(SVG + "text")]
    assert len(lines) == 5
    assert len(labels) == 4  # three rows for the crowded four; the fourth goes unlabelled
    assert len({y for _, y in labels[:3]}) == 3


@given(st.floats(-1e6, 1e6), st.floats(1e-3, 1e6), st.integers(2, 10))
def test_ticks_cover_the_range_in_round_steps(lo, span, count):
    hi = lo + span
    ticks = nice_ticks(lo, hi, count)
    assert ticks and all(lo - 1e-9 * span <= t <= hi + 1e-9 * span for t in ticks)
    step = nice_step(span, count)
    mantissa = step / 10 ** math.floor(math.log10(step))
    assert any(math.isclose(mantissa, m) for m in (1, 2, 2.5, 5, 10))
    assert len(ticks) <= 2 * count + 1


def test_plot_maps_data_into_the_frame_and_escapes_labels():
    plot = Plot((0, 10), (0, 100), title="<b>rack</b>", x_label="minutes", y_label="responses")
    assert plot.px(0) == plot.left and plot.px(10) == plot.width - plot.right
    assert plot.py(0) == plot.height - plot.bottom and plot.py(100) == plot.top
    plot.steps([0, 5, 10], [0, 50, 100], "c1")
    plot.marks([5], [50], "pellet", shape="square")
    plot.legend("c1", "press & hold")
    root = ET.fromstring(plot.render())
    assert root.tag == SVG + "svg"
    texts = [t.text for t in root.iter(SVG + "text")]
    assert "<b>rack</b>" in texts and "press & hold" in texts  # text, not markup
    line = next(root.iter(SVG + "polyline"))
    points = [tuple(map(float, p.split(","))) for p in line.get("points").split()]
    # a staircase: (0,0) (5,0) (5,50) (10,50) (10,100) in pixels
    assert points[0] == (plot.px(0), plot.py(0)) and points[-1] == (plot.px(10), plot.py(100))
    assert points[1] == (plot.px(5), plot.py(0)) and points[2] == (plot.px(5), plot.py(50))


def test_clip_ids_are_unique_within_a_page():
    first = ET.fromstring(Plot((0, 1), (0, 1), title="a").render())
    second = ET.fromstring(Plot((0, 1), (0, 1), title="b").render())
    ids = [c.get("id") for svg in (first, second) for c in svg.iter(SVG + "clipPath")]
    assert len(set(ids)) == 2
