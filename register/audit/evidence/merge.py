"""Joining the PDF parts of a pack (each written by reportlab on its own, in any process)
into one document, and numbering its pages.

The report is written in parts, the cover and one part per SIF (each SIF starts on a new
page), so the parts can be written in parallel and the joined document is the same bytes
however the SIFs were shared out. The page numbers are known only once every part is
there: they are drawn by reportlab in a document of their own (``stamp``: one page per
page of the report, nothing but the number) and laid over each page as an extra content
stream with its font.

Reads only what reportlab writes (``rl_config.invariant`` set, a flat page tree, one
object after another with the cross-reference table at the end); anything else is
refused with ``ValueError``.
"""

from __future__ import annotations

import hashlib
import re

_REF = re.compile(rb"(\d+) 0 R\b")
_HEAD = re.compile(rb"(\d+) 0 obj\r?\n")


class _Pdf:
    """The objects of one reportlab PDF: number -> (dictionary text, stream and its data
    up to ``endstream``, or nothing)."""

    def __init__(self, data: bytes):
        at = data.rfind(b"startxref")
        if at < 0:
            raise ValueError("not a PDF: no startxref")
        xref = int(data[at + 9:].split()[0])
        lines = data[xref:].split(b"\n", 2)
        if lines[0].strip() != b"xref":
            raise ValueError("a cross-reference stream, not a table: not a reportlab PDF")
        first, count = (int(x) for x in lines[1].split())
        table = lines[2]
        offsets = {}
        for i in range(count):
            entry = table[i * 20:(i + 1) * 20]
            if entry[17:18] == b"n":
                offsets[first + i] = int(entry[:10])
        order = sorted(offsets, key=offsets.get)
        ends = [offsets[n] for n in order[1:]] + [xref]
        self.objects: dict[int, tuple[bytes, bytes]] = {}
        for n, end in zip(order, ends, strict=True):
            body = data[offsets[n]:end]
            m = _HEAD.match(body)
            if not m or int(m[1]) != n:
                raise ValueError(f"object {n} is not where the table says")
            body = body[m.end():]
            body = body[:body.rindex(b"endobj")]
            cut = body.find(b"stream\n")
            if cut >= 0 and body[:cut].rstrip().endswith(b">>"):
                self.objects[n] = (body[:cut], body[cut:])
            else:
                self.objects[n] = (body, b"")
        trailer = data[data.rfind(b"trailer"):at]
        self.root = int(re.search(rb"/Root (\d+) 0 R", trailer)[1])
        info = re.search(rb"/Info (\d+) 0 R", trailer)
        self.info = int(info[1]) if info else None
        self.pages_obj = int(re.search(rb"/Pages (\d+) 0 R", self.objects[self.root][0])[1])
        pages = self.objects[self.pages_obj][0]
        if b"/Kids" not in pages:
            raise ValueError("no page list")
        self.pages = [int(x) for x in _REF.findall(pages[pages.index(b"/Kids"):
                                                         pages.index(b"]")])]
        for p in self.pages:
            if b"/Type /Pages" in self.objects[p][0]:
                raise ValueError("a nested page tree: not a reportlab PDF")

    def own(self) -> list[int]:
        """Objects to copy: all but the catalogue, the page tree and the document info."""
        drop = {self.root, self.pages_obj, self.info}
        return [n for n in sorted(self.objects) if n not in drop]


def _renumber(head: bytes, base: int) -> bytes:
    return _REF.sub(lambda m: b"%d 0 R" % (int(m[1]) + base), head)


def merge(parts: list[bytes], stamp, info: dict[str, str]) -> bytes:
    """One PDF of ``parts`` in order; ``stamp(count) -> bytes`` writes a PDF of ``count``
    pages whose page *i* holds what is to be laid over page *i* (the page number), with
    one font dictionary shared by its pages. ``info``: Title, Author, Subject,
    CreationDate (PDF date text)."""
    docs = [_Pdf(p) for p in parts]
    count = sum(len(d.pages) for d in docs)
    over = _Pdf(stamp(count))
    if len(over.pages) != count:
        raise ValueError("the page-number document has the wrong number of pages")
    out: list[tuple[int, bytes, bytes]] = []
    # 1 catalogue, 2 page tree, 3 info, 4 "save the state", 5 "restore it"; then the stamp's
    # fonts and content streams, then each part's objects.
    nxt = 6
    fonts_at = over.objects[over.pages[0]][0]
    font_dict = re.search(rb"/Font (\d+) 0 R", fonts_at)
    if not font_dict:
        raise ValueError("the page-number document has no font")
    names = re.findall(rb"/([A-Za-z0-9+]+) (\d+) 0 R", over.objects[int(font_dict[1])][0])
    base = nxt - 1
    page_objs = set(over.pages) | {int(font_dict[1])}
    stamp_contents = []
    for n in over.own():
        if n in page_objs:
            continue
        head, tail = over.objects[n]
        out.append((n + base, _renumber(head, base), tail))
    nxt = max(n + base for n in over.own()) + 1
    rename = {name: b"PN%d" % i for i, (name, _) in enumerate(names)}
    fonts = b"".join(b"/%s %d 0 R " % (rename[name], int(ref) + base) for name, ref in names)
    for p in over.pages:
        m = re.search(rb"/Contents (\d+) 0 R", over.objects[p][0])
        stamp_contents.append(int(m[1]) + base)
    # The stamp's content streams name its fonts by their new names (uncompressed text).
    renamed = []
    for n, head, tail in out:
        if n in stamp_contents:
            if b"/Filter" in head:
                raise ValueError("the page-number document must not be compressed")
            body = tail[len(b"stream\n"):tail.rindex(b"endstream")]
            for old, new in rename.items():
                body = re.sub(rb"/" + re.escape(old) + rb"(?=\s)", b"/" + new, body)
            head = re.sub(rb"/Length \d+", b"/Length %d" % len(body), head)
            tail = b"stream\n" + body + b"endstream\n"
        renamed.append((n, head, tail))
    out = renamed
    kids = []
    page_no = 0
    for d in docs:
        base = nxt - 1
        patched_fonts = set()
        for p in d.pages:
            head = d.objects[p][0]
            m = re.search(rb"/Font (\d+) 0 R", head)
            if m:
                patched_fonts.add(int(m[1]))
        for n in d.own():
            head, tail = d.objects[n]
            head = _renumber(head, base)
            if n in d.pages:
                head = re.sub(rb"/Parent \d+ 0 R", b"/Parent 2 0 R", head)
                head, done = re.subn(
                    rb"/Contents (\d+) 0 R",
                    lambda m, s=stamp_contents[page_no]: b"/Contents [ 4 0 R %s 0 R 5 0 R %d 0 R ]"
                    % (m[1], s), head)
                if done != 1:
                    raise ValueError("a page without one content stream")
                kids.append(n + base)
                page_no += 1
            elif n in patched_fonts:
                head = head.replace(b"<<", b"<<\n" + fonts, 1)
            out.append((n + base, head, tail))
        nxt = max(n + base for n in d.own()) + 1

    def pdf_text(value: str) -> bytes:
        # UTF-16 with its byte-order mark, as hex: any name or title prints as written.
        return b"<FEFF" + value.encode("utf-16-be").hex().upper().encode() + b">"

    fixed = [
        (1, b"<<\n/PageMode /UseNone /Pages 2 0 R /Type /Catalog\n>>\n", b""),
        (2, b"<<\n/Count %d /Kids [ %s ] /Type /Pages\n>>\n"
         % (len(kids), b" ".join(b"%d 0 R" % k for k in kids)), b""),
        (3, b"<<\n" + b" ".join(b"/%s %s" % (k.encode(), pdf_text(info[k]) if k != "CreationDate"
                                              else b"(" + info[k].encode("ascii") + b")")
                                for k in sorted(info))
         + b" /Producer (ReportLab PDF Library, parts joined by SIF Ledger)\n>>\n", b""),
        (4, b"<<\n/Length 2\n>>\n", b"stream\nq\nendstream\n"),
        (5, b"<<\n/Length 2\n>>\n", b"stream\nQ\nendstream\n"),
    ]
    objects = sorted(fixed + out)
    buf = bytearray(b"%PDF-1.4\n%\x93\x8c\x8b\x9e SIF Ledger evidence pack\n")
    offsets = {}
    for n, head, tail in objects:
        offsets[n] = len(buf)
        buf += b"%d 0 obj\n" % n + head
        buf += tail + b"endobj\n"
    size = max(offsets) + 1
    xref = len(buf)
    buf += b"xref\n0 %d\n0000000000 65535 f \n" % size
    for n in range(1, size):
        buf += (b"%010d 00000 n \n" % offsets[n]) if n in offsets else b"0000000000 65535 f \n"
    digest = hashlib.md5(bytes(buf), usedforsecurity=False).hexdigest().encode()
    buf += (b"trailer\n<<\n/ID [<%s><%s>]\n/Info 3 0 R\n/Root 1 0 R\n/Size %d\n>>\n"
            b"startxref\n%d\n%%%%EOF\n" % (digest, digest, size, xref))
    return bytes(buf)
