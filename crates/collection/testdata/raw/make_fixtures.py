"""Writes the camera RAW test files of this folder (run from it: python3 make_fixtures.py).

preview.dng is written by tifffile (2026.3.3) with a JPEG preview made by Pillow (13.0.0):
tifffile cannot JPEG-compress without imagecodecs, so the preview SubIFD is written
uncompressed with the JPEG's bytes as its one strip, and its Compression, Photometric and
size entries are then set in place. The other files are laid out byte by byte here, after
the TIFF 6.0 header and directory layout, with the CR2 signature at byte 8, the ORF magic
"RO" and the RW2 magic 0x55 in place of 42 (ExifTool 12.57, Image/ExifTool.pm DoProcessTIFF).
"""

import io
import struct

import numpy
import tifffile
from PIL import Image

XMP = (
    b'<x:xmpmeta xmlns:x="adobe:ns:meta/"><rdf:RDF '
    b'xmlns:rdf="http://www.w3.org/1999/02/22-rdf-syntax-ns#" '
    b'xmlns:dc="http://purl.org/dc/elements/1.1/"><rdf:Description><dc:subject><rdf:Bag>'
    b"<rdf:li>tide pool</rdf:li></rdf:Bag></dc:subject></rdf:Description></rdf:RDF></x:xmpmeta>"
)


def jpeg(width, height, quality=80):
    im = Image.new("RGB", (width, height))
    im.putdata(
        [(x * 255 // width, y * 255 // height, 60) for y in range(height) for x in range(width)]
    )
    out = io.BytesIO()
    im.save(out, "JPEG", quality=quality)
    return out.getvalue()


def dng(path, preview):
    with tifffile.TiffWriter(path) as w:
        w.write(
            numpy.zeros((12, 16, 3), numpy.uint8),
            photometric="rgb",
            subfiletype=1,
            subifds=2,
            extratags=[(50706, 1, 4, (1, 4, 0, 0), True), (700, 1, len(XMP), XMP, True)],
        )
        w.write(numpy.zeros((48, 64), numpy.uint16), photometric=32803, subfiletype=0)
        w.write(
            numpy.frombuffer(preview, numpy.uint8).reshape(1, -1),
            photometric="minisblack",
            subfiletype=1,
        )
    with tifffile.TiffFile(path) as t:
        sub = t.pages[0].pages[1]  # the second SubIFD
        patches = {
            259: 7,  # Compression: JPEG
            262: 6,  # PhotometricInterpretation: YCbCr
            256: 160,
            257: 120,
        }
        edits = [(sub.tags[code], value) for code, value in patches.items()]
    with open(path, "r+b") as f:
        for tag, value in edits:
            f.seek(tag.valueoffset)
            f.write(struct.pack("<H" if tag.dtype == 3 else "<I", value))


def tiff_like(magic, entries, blobs, ifd0_at=8, header_tail=b"", next_ifds=()):
    """Little-endian TIFF-style file: `magic` (4 bytes), IFD0 offset, `header_tail`, then
    IFD0 (entries: (tag, type, count, value-or-blob-name)) followed by the chained
    directories `next_ifds`, then the blobs; a value naming a blob becomes its offset."""
    dirs = [entries, *next_ifds]
    size = lambda d: 2 + 12 * len(d) + 4
    at = ifd0_at
    dir_at = []
    for d in dirs:
        dir_at.append(at)
        at += size(d)
    blob_at = {}
    for name, data in blobs.items():
        blob_at[name] = at
        at += len(data)
    out = magic + struct.pack("<I", ifd0_at) + header_tail
    assert len(out) == ifd0_at
    for i, d in enumerate(dirs):
        out += struct.pack("<H", len(d))
        for tag, kind, count, value in sorted(d):
            value = blob_at.get(value, value) if isinstance(value, str) else value
            if kind == 3 and count == 1:
                out += struct.pack("<HHIHH", tag, kind, count, value, 0)
            else:
                out += struct.pack("<HHII", tag, kind, count, value)
        out += struct.pack("<I", dir_at[i + 1] if i + 1 < len(dirs) else 0)
    for data in blobs.values():
        out += data
    return out


def main():
    big = jpeg(160, 120)
    thumb = jpeg(32, 24)
    dng("preview.dng", big)

    # CR2: IFD0 holds the large JPEG as one strip (Compression 6) and Orientation 6;
    # IFD1 a small thumbnail through JPEGInterchangeFormat.
    cr2 = tiff_like(
        b"II*\0",
        [(0x0103, 3, 1, 6), (0x0111, 4, 1, "big"), (0x0112, 3, 1, 6), (0x0117, 4, 1, len(big))],
        {"big": big, "thumb": thumb},
        ifd0_at=16,
        header_tail=b"CR\x02\0\0\0\0\0",
        next_ifds=[[(0x0201, 4, 1, "thumb"), (0x0202, 4, 1, len(thumb))]],
    )
    open("preview.cr2", "wb").write(cr2)
    # The same file cut in the middle of its large preview (the thumbnail after it is gone).
    open("truncated.cr2", "wb").write(cr2[: len(cr2) - len(thumb) - len(big) // 2])

    # ORF: "IIRO", the preview in IFD0 through JPEGInterchangeFormat.
    orf = tiff_like(
        b"IIRO", [(0x0201, 4, 1, "big"), (0x0202, 4, 1, len(big))], {"big": big}
    )
    open("preview.orf", "wb").write(orf)

    # RW2: "IIU\0", IFD0 at 0x18 after the 16-byte RW2 signature, JpgFromRaw (0x002E).
    rw2_sig = bytes.fromhex("88e774d8f8251d4d947a6e77822b5d6a")
    rw2 = tiff_like(
        b"IIU\0", [(0x002E, 7, len(big), "big")], {"big": big}, ifd0_at=24, header_tail=rw2_sig
    )
    open("preview.rw2", "wb").write(rw2)

    # NEF without a preview: one uncompressed strip of sensor data only.
    sensor = bytes(range(256)) * 8
    nef = tiff_like(
        b"II*\0",
        [(0x0103, 3, 1, 1), (0x0106, 3, 1, 32803), (0x0111, 4, 1, "cfa"), (0x0117, 4, 1, len(sensor))],
        {"cfa": sensor},
    )
    open("no-preview.nef", "wb").write(nef)


if __name__ == "__main__":
    main()
