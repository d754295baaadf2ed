"""The shared rendering helper: PNG encoding, blitting, partial repaints, event coalescing."""

from __future__ import annotations

import asyncio
import io
import zlib

import matplotlib
import numpy as np
import pytest
from matplotlib.image import AxesImage
from PIL import Image

from qwidgets.viz.canvas import BlitCanvas, encode_png
from qwidgets.viz.pixel_image import PixelImage
from qwidgets.viz.png import FrameEncoder, adler32_combine, isal_zlib
from qwidgets.widgets.events import Coalescer, MessageLine
from qwidgets.widgets.image_canvas import PlotCanvas

# both compressors the frame encoder can use (ISA-L's where the isal package is installed: it
# is a dependency wherever it has wheels, so CI runs both)
DEFLATES = ["zlib", pytest.param("isal", marks=pytest.mark.skipif(
    isal_zlib is None, reason="the isal package has no wheel for this platform"))]


def test_encode_png_decodes_to_the_same_pixels_with_pillow():
    """Reference: Pillow's PNG decoder reads back exactly the RGB pixels given."""
    rng = np.random.default_rng(0)
    rgba = rng.integers(0, 256, size=(37, 53, 4), dtype=np.uint8)
    for level in (0, 1, 9):
        with Image.open(io.BytesIO(encode_png(rgba, level))) as im:
            assert im.mode == "RGB" and im.size == (53, 37)
            np.testing.assert_array_equal(np.asarray(im), rgba[..., :3])
    with pytest.raises(ValueError, match="rgba must be an"):
        encode_png(np.zeros((4, 4), np.uint8))
    with pytest.raises(ValueError, match="compress_level must be in 0..9"):
        encode_png(rgba, 10)


@pytest.mark.parametrize("deflate", DEFLATES)
def test_frame_encoder_recompresses_changed_bands_and_decodes_to_the_same_pixels(deflate):
    """Reference: Pillow's PNG decoder (and zlib's checks inside it) reads back every frame
    exactly; only the bands of rows that changed are compressed again."""
    rng = np.random.default_rng(1)
    frame = np.full((100, 61, 4), 255, np.uint8)
    frame[10:90, 5:50, :3] = rng.integers(0, 256, size=(80, 45, 3), dtype=np.uint8)
    enc = FrameEncoder(band_rows=16, deflate=deflate)  # 7 bands, the last one 4 rows
    assert enc.deflate == deflate
    for step, rows in enumerate([None, (20, 21), (0, 1), (96, 100), (15, 17), None]):
        if rows is not None:
            frame[rows[0]:rows[1], 3:40, :3] = rng.integers(0, 256, size=(rows[1] - rows[0], 37, 3))
        before = enc.bands_encoded
        png = enc.encode(frame)
        with Image.open(io.BytesIO(png)) as im:  # an RGBA frame is written as RGBA
            assert im.mode == "RGBA"
            np.testing.assert_array_equal(np.asarray(im), frame)
        expected = 7 if step == 0 else (0 if rows is None else len({r // 16 for r in range(*rows)}))
        assert enc.bands_encoded - before == expected
    assert enc.encode(frame[:50]) != png  # a new size starts afresh
    with pytest.raises(ValueError, match="band_rows"):
        FrameEncoder(band_rows=0)


@pytest.mark.parametrize("deflate", DEFLATES)
def test_frame_encoder_prepares_the_rows_outside_a_span_and_then_compresses_the_rest(deflate):
    """``prepare`` compresses the changed bands wholly outside the span given; the next frame,
    changed inside the span too, compresses only the bands the span touches, and decodes
    (Pillow's decoder, as above) to exactly that frame, as a fresh encoder's PNG does."""
    rng = np.random.default_rng(3)
    frame = np.full((100, 61, 4), 255, np.uint8)
    enc = FrameEncoder(band_rows=16, deflate=deflate)
    enc.encode(frame)
    frame[:, 2:30, :3] = rng.integers(0, 256, size=(100, 28, 3), dtype=np.uint8)  # every band
    before = enc.bands_encoded
    enc.prepare(frame, (40, 70))  # bands 2, 3 and 4 (rows 32..79) reach into rows 40..69
    assert enc.bands_encoded - before == 4
    frame[45:60, 40:50, :3] = 7  # inside the span: drawn after prepare
    png = enc.encode(frame)
    assert enc.bands_encoded - before == 7
    with Image.open(io.BytesIO(png)) as im:
        np.testing.assert_array_equal(np.asarray(im.convert("RGB")), frame[..., :3])
    assert png == FrameEncoder(band_rows=16, deflate=deflate).encode(frame)


@pytest.mark.parametrize("deflate", DEFLATES)
def test_frame_encoder_split_across_two_threads_writes_the_same_bytes(deflate):
    """Half of many changed bands compressed on a second thread: the PNG is byte for byte the
    one-thread encoder's, and Pillow's decoder (reference) reads the frame back exactly."""
    rng = np.random.default_rng(4)
    frame = np.full((300, 61, 4), 255, np.uint8)
    split = FrameEncoder(band_rows=8, split=True, deflate=deflate)
    plain = FrameEncoder(band_rows=8, split=False, deflate=deflate)
    split.split = True  # (on a one-CPU machine too: the bytes are what is checked)
    for rows in [(0, 300), (10, 200), (150, 152), (0, 300)]:  # 38, 24, 1 and 38 bands
        frame[rows[0]:rows[1], 3:50, :3] = rng.integers(0, 256, size=(rows[1] - rows[0], 47, 3))
        png = split.encode(frame)
        assert png == plain.encode(frame)
        with Image.open(io.BytesIO(png)) as im:
            np.testing.assert_array_equal(np.asarray(im), frame)
    assert split.bands_encoded == plain.bands_encoded == 38 + 24 + 1 + 38


def test_frame_encoder_chooses_its_compressor_and_rejects_a_bad_one():
    """``auto`` takes ISA-L at its levels 1 to 3 where the isal package is installed, zlib
    otherwise (level 0 stores, levels 4 to 9 are zlib's); a compressor that cannot serve the
    level, or an unknown one, is a clear error naming the parameter."""
    have = isal_zlib is not None
    assert FrameEncoder().deflate == ("isal" if have else "zlib")
    assert FrameEncoder(compress_level=0).deflate == FrameEncoder(compress_level=6).deflate == "zlib"
    assert FrameEncoder(deflate="zlib").deflate == "zlib"
    with pytest.raises(ValueError, match="deflate must be one of"):
        FrameEncoder(deflate="gzip")
    with pytest.raises(ValueError, match="deflate='isal' needs the isal package"):
        FrameEncoder(compress_level=0 if have else 1, deflate="isal")


@pytest.mark.skipif(isal_zlib is None, reason="the isal package has no wheel for this platform")
def test_frame_encoder_isal_and_zlib_frames_hold_the_same_pixels():
    """The two compressors write different bytes of one image: Pillow's decoder (reference)
    reads the same pixels from both, frame after frame, a figure-like frame at the real size."""
    rng = np.random.default_rng(5)
    frame = np.full((600, 720, 4), 255, np.uint8)
    frame[40:560, 60:680:7, :3] = 30  # thin lines on white, as a plot has
    fast, plain = FrameEncoder(deflate="isal"), FrameEncoder(deflate="zlib")
    for rows in [(0, 600), (300, 331), (590, 600)]:
        frame[rows[0]:rows[1], 100:400, :3] = rng.integers(0, 256, size=(rows[1] - rows[0], 300, 3))
        a, b = fast.encode(frame), plain.encode(frame)
        for png in (a, b):
            with Image.open(io.BytesIO(png)) as im:
                np.testing.assert_array_equal(np.asarray(im), frame)
    assert fast.bands_encoded == plain.bands_encoded == 38 + 3 + 2  # rows 288..335, 576..599


def test_adler32_combine_equals_zlib_on_the_joined_bytes():
    """Reference: zlib.adler32 of the joined bytes (lengths beyond the modulus 65521 too)."""
    rng = np.random.default_rng(2)
    for n1, n2 in [(0, 0), (1, 0), (0, 7), (100, 65521), (65521, 3), (3000, 200_000), (17, 1)]:
        a = rng.integers(0, 256, n1, dtype=np.uint8).tobytes()
        b = rng.integers(0, 256, n2, dtype=np.uint8).tobytes()
        assert adler32_combine(zlib.adler32(a), zlib.adler32(b), n2) == zlib.adler32(a + b)


def _two_panels():
    canvas = PlotCanvas(400, 200)
    left, right = canvas.figure.subplots(1, 2, gridspec_kw={"wspace": 0.6})
    (a,) = left.plot([0, 1, 2], [0, 1, 0], color="C0")
    (b,) = right.plot([0, 1, 2], [1, 0, 1], color="C1")
    left.set_title("left")
    right.set_xlabel("value")
    canvas.animate(a, b)
    return canvas, left, right, a, b


def _fresh(canvas) -> np.ndarray:
    canvas.invalidate()
    return canvas.draw().copy()


def test_blitted_frames_equal_a_full_redraw():
    canvas, left, right, a, b = _two_panels()
    canvas.render()
    assert canvas.full_draws == 1
    a.set_ydata([1, 0, 1])
    blitted = canvas.draw().copy()
    assert canvas.full_draws == 1 and canvas.partial_draws == 0  # only the line was drawn
    np.testing.assert_array_equal(blitted, _fresh(canvas))


def test_only_the_axes_whose_artist_changed_is_blitted():
    canvas, left, right, a, b = _two_panels()
    canvas.render()
    blits = canvas.blits
    b.set_ydata([0, 2, 0])  # the right panel only
    frame = canvas.draw().copy()
    assert canvas.blits == blits + 1 and canvas.full_draws == 1
    np.testing.assert_array_equal(frame, _fresh(canvas))
    canvas.draw()
    blits = canvas.blits
    canvas.draw()  # nothing changed: nothing drawn
    assert canvas.blits == blits


def test_new_limits_repaint_only_that_axes_and_match_a_full_redraw():
    canvas, left, right, a, b = _two_panels()
    canvas.render()
    right.set_xlim(-5, 50)  # new ticks and labels on the right only
    partial = canvas.draw().copy()
    assert canvas.partial_draws == 1 and canvas.full_draws == 1
    np.testing.assert_array_equal(partial, _fresh(canvas))
    right.set_xlim(-5, 50)
    canvas.draw()
    right.set_xlim(0, 3)  # a view not seen before: repainted, old labels blanked
    partial = canvas.draw().copy()
    assert canvas.partial_draws == 2
    np.testing.assert_array_equal(partial, _fresh(canvas))
    right.set_xlim(-5, 50)
    canvas.draw()
    right.set_xlim(0, 3)
    canvas.draw()
    right.set_xlim(-5, 50)  # a view seen before: its kept background is reused, no drawing
    kept, full = canvas.kept_draws, canvas.full_draws
    partial = canvas.draw().copy()
    assert canvas.kept_draws == kept + 1 and canvas.full_draws == full
    np.testing.assert_array_equal(partial, _fresh(canvas))
    left.set_title("a longer title now")
    canvas.invalidate(left)  # a static change announced for one axes
    partial = canvas.draw().copy()
    np.testing.assert_array_equal(partial, _fresh(canvas))


def test_saved_figure_contains_the_animated_artists(tmp_path):
    canvas, left, right, a, b = _two_panels()
    a.set_color("#ff0000")
    a.set_linewidth(6)
    canvas.render()
    canvas.save(tmp_path / "f.png")
    with Image.open(tmp_path / "f.png") as im:
        px = np.asarray(im.convert("RGB")).reshape(-1, 3)
    assert ((px[:, 0] > 240) & (px[:, 1] < 30) & (px[:, 2] < 30)).sum() > 50
    canvas.save(tmp_path / "f.svg")
    assert "<svg" in (tmp_path / "f.svg").read_text()
    assert a.get_animated()  # still blitted afterwards
    with pytest.raises(ValueError, match=r"\.png or \.svg"):
        canvas.save(tmp_path / "f.pdf")


def test_image_widget_has_a_fixed_pixel_size():
    canvas = PlotCanvas(640, 300)
    assert (canvas.image.layout.width, canvas.image.layout.height) == ("640px", "300px")
    canvas.figure.add_subplot().plot([0, 1])
    png = canvas.render()
    assert canvas.image.value == png
    with Image.open(io.BytesIO(png)) as im:
        assert im.size == (640, 300)
    with pytest.raises(ValueError, match="at least 50x50"):
        PlotCanvas(10, 300)


class _ManualLoop:
    """An event loop stand-in with a clock that moves only when the test says so: the
    coalescer's scheduling is checked without depending on how fast this machine is."""

    def __init__(self):
        self.now = 0.0
        self.timers = []  # [due time, callback, handle]

    def time(self):
        return self.now

    def call_later(self, delay, callback, *args):
        loop = self

        class Handle:
            cancelled = False

            def cancel(self):
                self.cancelled = True
                loop.timers = [t for t in loop.timers if t[2] is not self]

        h = Handle()
        self.timers.append([self.now + delay, lambda: callback(*args), h])
        return h

    def advance(self, seconds):
        self.now += seconds
        due = sorted((t for t in self.timers if t[0] <= self.now), key=lambda t: t[0])
        self.timers = [t for t in self.timers if t[0] > self.now]
        for _, run, _ in due:
            run()


def test_coalescer_runs_one_call_for_a_burst_on_the_event_loop(monkeypatch):
    import qwidgets.widgets.events as events

    loop = _ManualLoop()
    monkeypatch.setattr(events, "_running_loop", lambda: loop)
    seen = []
    state = {"value": 0}
    c = Coalescer(lambda: seen.append(state["value"]), delay=0.01)
    for i in range(200):  # a burst arriving faster than the delay, however slow the machine
        state["value"] = i
        c.request()
        loop.advance(0.00001)
    assert seen == [] and c.pending and len(loop.timers) == 1  # one call scheduled, not 200
    loop.advance(0.01)
    assert seen == [199]  # one call, and it saw the last value
    assert c.requests == 200 and c.calls == 1 and not c.pending and loop.timers == []
    # a request after the call schedules the next one
    c.request()
    loop.advance(0.005)
    assert seen == [199]
    loop.advance(0.005)
    assert seen == [199, 199] and c.calls == 2


def test_coalescer_on_a_real_asyncio_loop_calls_once_after_the_burst():
    # the real loop, with no timing assumption: the burst runs without yielding, so the
    # scheduled call cannot run before the burst ends, however long the burst takes
    seen = []
    c = Coalescer(lambda: seen.append(len(seen)), delay=0.01)

    async def burst():
        for _ in range(200):
            c.request()
        while c.pending:
            await asyncio.sleep(0.005)

    asyncio.run(burst())
    assert seen == [0] and c.requests == 200 and c.calls == 1


def test_coalescer_without_a_loop_waits_for_flush_and_reports_errors():
    calls = []
    c = Coalescer(lambda: calls.append(1))
    for _ in range(5):
        c.request()
    assert calls == [] and c.pending
    assert c.flush() and calls == [1] and not c.flush()
    errors = []

    def boom():
        raise RuntimeError("no")

    c = Coalescer(boom, on_error=errors.append)
    c.request()
    c.flush()
    assert isinstance(errors[0], RuntimeError)
    c = Coalescer(boom)
    c.request()
    with pytest.raises(RuntimeError):
        c.flush()
    c.request()
    c.cancel()
    assert not c.pending
    with pytest.raises(TypeError, match="callback must be callable"):
        Coalescer(3)
    with pytest.raises(ValueError, match="delay must be >= 0"):
        Coalescer(print, delay=-1)


def test_message_line_shows_errors_and_notes():
    m = MessageLine()
    with m.guard("fit"):
        raise ValueError("scale must be > 0, got -0.1")
    assert m.is_error and m.text == "fit failed: ValueError: scale must be > 0, got -0.1"
    assert "scale must be &gt; 0" in m.widget.value  # escaped HTML
    assert "Traceback" in m.last_traceback
    m.info("fitted <range>")
    assert not m.is_error and "&lt;range&gt;" in m.widget.value
    m.clear()
    assert m.text == "" and m.widget.value == ""
    assert "qw-message" in m.widget._dom_classes


def test_a_first_prepare_then_encode_of_the_same_pixels_encodes_every_band():
    """A first frame prepared with its middle rows skipped, then encoded unchanged: the
    skipped bands are encoded then (they were never compressed, whatever the pixels kept
    say); Pillow's decoder reads back exactly the frame."""
    frame = np.zeros((100, 61, 4), np.uint8)  # the same pixels as a fresh encoder's kept frame
    enc = FrameEncoder(band_rows=16)
    enc.prepare(frame, (40, 70))
    png = enc.encode(frame)
    with Image.open(io.BytesIO(png)) as im:
        np.testing.assert_array_equal(np.asarray(im.convert("RGB")), frame[..., :3])


def test_pixel_image_draws_what_matplotlib_draws_up_to_cell_edges():
    """Reference: matplotlib's own AxesImage (nearest interpolation) on the same axes: every
    pixel of the lookup-drawn image equals matplotlib's pixel there or one pixel away (ties at
    cell edges), under 3% differ, and the pixels outside the axes are untouched. A
    translucent image, or one a renderer without a pixel buffer draws (SVG), is drawn by
    matplotlib itself."""
    rng = np.random.default_rng(5)
    data = matplotlib.colormaps["viridis"](rng.random((13, 47)), bytes=True)
    frames = {}
    for cls in (AxesImage, PixelImage):
        canvas = BlitCanvas(300, 200)
        ax = canvas.figure.add_axes([0.137, 0.211, 0.611, 0.543])
        im = cls(ax, origin="lower", interpolation="nearest", extent=(0, 1, 0, 1))
        im.set_data(data)
        im.set_clip_path(ax.patch)
        ax.add_image(im)
        ax.set_xlim(0, 1)
        ax.set_ylim(0, 1)
        frames[cls] = canvas.draw().copy()
    ours, theirs = frames[PixelImage], frames[AxesImage]
    near = np.zeros(ours.shape[:2], bool)
    for dr in (-1, 0, 1):
        for dc in (-1, 0, 1):
            near |= (ours == np.roll(theirs, (dr, dc), axis=(0, 1))).all(axis=2)
    assert near.all()
    assert (ours != theirs).any(axis=2).mean() < 0.03
    svg = io.StringIO()
    canvas.figure.savefig(svg, format="svg")  # no pixel buffer: matplotlib's own draw
    assert "<image" in svg.getvalue()
    im.set_alpha(0.5)
    canvas.invalidate()
    half = canvas.draw()
    assert not np.array_equal(half, ours)  # blended with the white background by matplotlib


def test_pixel_image_redrawn_after_a_new_shape_or_place_equals_a_fresh_one():
    """The lookup of cells under pixels is kept between draws: after the image gets data of
    another shape, another origin, or its axes move, the pixels equal those of a PixelImage
    drawing that state for the first time (reference: a fresh canvas, same figure layout)."""
    rng = np.random.default_rng(7)

    def scene(pos, shape, origin, im=None, canvas=None):
        canvas = canvas or BlitCanvas(240, 180)
        if im is None:
            ax = canvas.figure.add_axes(pos)
            im = PixelImage(ax, interpolation="nearest", extent=(0, 1, 0, 1))
            im.set_clip_path(ax.patch)
            ax.add_image(im)
            ax.set_xlim(0, 1)
            ax.set_ylim(0, 1)
        im.axes.set_position(pos)
        im.origin = origin
        im.set_data(matplotlib.colormaps["viridis"](rng_data[shape], bytes=True))
        canvas.invalidate()
        return canvas, im, canvas.draw().copy()

    rng_data = {s: rng.random(s) for s in ((5, 9), (17, 3), (2, 40))}
    states = [([0.1, 0.1, 0.6, 0.7], (5, 9), "lower"), ([0.1, 0.1, 0.6, 0.7], (17, 3), "lower"),
              ([0.1, 0.1, 0.6, 0.7], (17, 3), "upper"), ([0.3, 0.2, 0.5, 0.4], (17, 3), "upper"),
              ([0.3, 0.2, 0.5, 0.4], (2, 40), "lower"), ([0.1, 0.1, 0.6, 0.7], (5, 9), "lower")]
    canvas, im, _ = scene(*states[0])
    for state in states:
        _, _, kept = scene(*state, im=im, canvas=canvas)
        _, _, fresh = scene(*state)
        np.testing.assert_array_equal(kept, fresh, err_msg=str(state))


def test_frame_encoder_writes_the_channels_it_is_given():
    """Reference: Pillow's PNG decoder. An RGB frame comes back as RGB, an RGBA frame as
    RGBA with its alpha (translucent pixels included), each byte exact."""
    rng = np.random.default_rng(3)
    for channels, mode in ((3, "RGB"), (4, "RGBA")):
        frame = rng.integers(0, 256, size=(41, 29, channels), dtype=np.uint8)
        with Image.open(io.BytesIO(FrameEncoder(band_rows=8).encode(frame))) as im:
            assert im.mode == mode
            np.testing.assert_array_equal(np.asarray(im), frame)
