#!/usr/bin/env python3
"""Copies a folder of pictures with every picture enlarged, so that describing them costs
what describing camera pictures costs (the generated demo pictures are about 150 x 100).

    enlarge.py SOURCE TARGET [--factor 10]

Same file names and formats (JPEG quality 90, PNG at the fastest compression); every other
file (sidecars, notes) is copied as it is, and every file keeps its modification time.
Needs Pillow.
"""

import argparse
import os
import shutil

from PIL import Image


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("source")
    parser.add_argument("target")
    parser.add_argument("--factor", type=int, default=10)
    options = parser.parse_args()
    for folder, _, names in os.walk(options.source):
        if ".tagweave" in folder.split(os.sep):
            continue
        out_folder = os.path.join(options.target, os.path.relpath(folder, options.source))
        os.makedirs(out_folder, exist_ok=True)
        for name in sorted(names):
            source = os.path.join(folder, name)
            target = os.path.join(out_folder, name)
            extension = name.rsplit(".", 1)[-1].lower()
            if extension in ("jpg", "jpeg", "png"):
                with Image.open(source) as picture:
                    size = (picture.width * options.factor, picture.height * options.factor)
                    large = picture.convert("RGB").resize(size, Image.BILINEAR)
                if extension == "png":
                    large.save(target, "PNG", compress_level=1)
                else:
                    large.save(target, "JPEG", quality=90)
                shutil.copystat(source, target)
            else:
                shutil.copy2(source, target)


if __name__ == "__main__":
    main()
