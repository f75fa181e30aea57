"""Map figures: the scale bar and its label stay inside the image they measure."""

import numpy as np
import pytest


@pytest.mark.parametrize("origin", ["upper", "lower"])
def test_scale_bar_label_lies_inside_the_image(origin):
    # the label once sat below the bar and ran over the frame and the tick labels
    # (common practice: a scale bar and its label drawn inside the image)
    from matplotlib.backends.backend_agg import FigureCanvasAgg

    from mapkit.export.figures import _figure, _scale_bar

    fig = _figure(figsize=(4, 3))
    FigureCanvasAgg(fig)
    ax = fig.add_subplot()
    extent = (0, 120, 90, 0) if origin == "upper" else (0, 120, 0, 90)
    ax.imshow(np.zeros((30, 40)), extent=extent, origin=origin)
    _scale_bar(ax, extent)
    fig.canvas.draw()
    renderer = fig.canvas.get_renderer()
    box = ax.get_window_extent(renderer)
    label = ax.texts[-1]
    assert label.get_text().endswith("µm")
    t = label.get_window_extent(renderer)
    assert box.x0 <= t.x0 and t.x1 <= box.x1 and box.y0 <= t.y0 and t.y1 <= box.y1
    # and above the bar on screen
    bar = ax.patches[-1].get_window_extent(renderer)
    assert t.y0 >= bar.y1 - 1
