"""The text alternative of a chart (WCAG 2.1 SC 1.1.1): its title, axes and the numbers a
reader takes from the picture, read from the plotly figure dict itself."""

from __future__ import annotations

import numpy as np

from actdoc.web.describe import describe


def test_a_short_categorical_series_is_read_out_value_by_value():
    figure = {"data": [{"type": "bar", "name": "dead", "x": ["hidden1", "hidden2", "out"],
                        "y": [0.0, 0.516, None]}],
              "layout": {"title": {"text": "Share of units"}, "yaxis": {"title": "share"}}}
    assert describe(figure) == ("Share of units. Vertical axis: share. "
                                "dead: hidden1 0, hidden2 0.516.")


def test_a_histogram_names_its_range_and_peak_and_a_curve_its_ends():
    edges = np.linspace(-2.0, 2.0, 5)
    figure = {"data": [{"type": "bar", "name": "inputs", "x": edges,
                        "y": np.array([1, 7, 3, 0, np.nan])},
                       {"type": "scatter", "mode": "lines", "name": "f(z)",
                        "x": [-2.0, 0.0, 2.0], "y": [0.1, 0.5, 0.9]}],
              "layout": {"title": {"text": "Inputs"}, "xaxis": {"title": {"text": "z"}}}}
    assert describe(figure) == ("Inputs. Horizontal axis: z. inputs: 4 bars from -2 to 1, "
                                "highest at -1 (7). f(z): a line from 0.1 at -2 to 0.9 at 2.")


def test_points_give_their_extent_and_a_figure_may_say_it_itself():
    cloud = {"data": [{"type": "scatter", "mode": "markers", "name": "dead",
                       "x": [0.0, 0.5, 1.0], "y": [2.0, 3.0, 4.0]}],
             "layout": {"title": "Unit map"}}
    assert describe(cloud) == "Unit map. dead: 3 points, values from 2 to 4 against 0 to 1."
    own = {"data": cloud["data"], "layout": {"title": "Unit map",
                                             "meta": {"summary": "3 units, one dead."}}}
    assert describe(own) == "Unit map. 3 units, one dead."
    assert describe(None) == ""
