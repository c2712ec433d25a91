"""The pack's report tables and PNG charts, written the fast way, say what they said:
a table cell longer than its column is broken into lines that each fit (every word kept,
in order, none of them dropped or run past the column), a word wider than its column still
goes through a paragraph, and the zip's PNG holds exactly the pixels drawn."""

import io
import shutil
import subprocess

import pytest
from PIL import Image, ImageChops, ImageDraw
from reportlab.pdfbase.pdfmetrics import stringWidth
from reportlab.platypus import Paragraph, SimpleDocTemplate, Table

from register.audit.evidence import chart, pdf


def _cell(kit, text, share=0.3):
    """The cell the pack's table helper makes for ``text`` in a column of ``share``."""
    t = kit.table(["Header"], [[text]], [share])[0]
    assert isinstance(t, Table)
    return t._cellvalues[1][0]


def test_a_long_cell_becomes_lines_that_each_fit_with_every_word():
    kit = pdf._kit()
    words = [f"word{i}" for i in range(60)]
    text = " ".join(words)
    value = _cell(kit, text)
    assert isinstance(value, str) and "\n" in value
    room = 0.3 * kit.width - 2 * 2.5 - 0.5
    lines = value.split("\n")
    assert len(lines) > 1
    assert all(stringWidth(line, kit.small.fontName, kit.small.fontSize) <= room
               for line in lines)
    assert " ".join(lines).split() == words


def test_a_short_cell_stays_one_string_and_an_over_wide_word_a_paragraph():
    kit = pdf._kit()
    assert _cell(kit, "pass") == "pass"
    assert isinstance(_cell(kit, "x" * 400), Paragraph)
    assert isinstance(_cell(kit, "two\nlines"), Paragraph)  # as before: newlines are text


@pytest.mark.skipif(shutil.which("pdftotext") is None, reason="needs poppler's pdftotext")
def test_wrapped_cells_print_every_word_on_the_page(tmp_path):
    kit = pdf._kit()
    words = [f"term{i:02d}" for i in range(40)]
    buf = io.BytesIO()
    SimpleDocTemplate(buf).build(kit.table(["A", "B"], [[" ".join(words), "right"]],
                                           [0.25, 0.75]))
    (tmp_path / "t.pdf").write_bytes(buf.getvalue())
    text = subprocess.run(["pdftotext", str(tmp_path / "t.pdf"), "-"], capture_output=True,
                          text=True, check=True).stdout
    assert [w for w in text.split() if w.startswith("term")] == words


def test_the_png_writer_keeps_every_pixel():
    img = Image.new("RGB", (301, 123), "white")
    draw = ImageDraw.Draw(img)
    draw.line([(0, 0), (300, 122)], fill=(200, 30, 40), width=3)
    draw.rectangle([40, 20, 90, 70], fill=(10, 120, 200))
    draw.text((110, 50), "PFD 1e-3", fill="black")
    data = chart._png_bytes(img)
    back = Image.open(io.BytesIO(data))
    back.load()
    assert back.mode == "RGB" and back.size == img.size
    assert ImageChops.difference(back, img).getbbox() is None
