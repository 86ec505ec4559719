"""File and OpenML adapters, the package cache, and offline behaviour."""

import os
import subprocess
import sys
from pathlib import Path
from xml.sax.saxutils import escape

import numpy as np
import pandas as pd
import pytest

from evenflag.data import cache
from evenflag.data.registry import get_spec, load_dataset
from evenflag.errors import ChecksumError, DatasetError, FetchError


def _file_spec(path, **extra):
    spec = {"name": "my_claims", "source": {"kind": "file", "path": str(path)}, "label": "outcome",
            "anomaly_values": ["fraud"], "group": ["region"]}
    spec.update(extra)
    return spec


@pytest.mark.parametrize("suffix", [".csv", ".parquet", ".csv.gz"])
def test_file_adapter_round_trip(tmp_path, suffix):
    ds = load_dataset("german_credit")
    frame = ds.features.copy()
    frame["region"] = ds.group.astype(str).to_numpy()
    frame["outcome"] = np.where(ds.label == 1, "fraud", "ok")
    path = tmp_path / f"claims{suffix}"
    if suffix == ".parquet":
        frame.to_parquet(path)
    else:
        frame.to_csv(path, index=False)
    loaded = load_dataset(_file_spec(path))
    assert np.array_equal(loaded.label, ds.label)
    assert list(loaded.group.astype(str)) == list(ds.group.astype(str))
    pd.testing.assert_frame_equal(loaded.features, ds.features, check_dtype=False)
    assert loaded.source == f"file:{path}"


def _write_openml_cache(root: Path, frame: pd.DataFrame, dataset_id: int = 31) -> None:
    """Lay out a dataset the way the openml package caches it (files it reads:
    description.xml, features.xml and dataset_<id>.pq)."""
    folder = root / "org" / "openml" / "www" / "datasets" / str(dataset_id)
    folder.mkdir(parents=True)
    dead = "http://127.0.0.1:9"
    (folder / "description.xml").write_text(
        '<oml:data_set_description xmlns:oml="http://openml.org/openml">'
        f"<oml:id>{dataset_id}</oml:id><oml:name>credit-g</oml:name><oml:version>1</oml:version>"
        f"<oml:format>ARFF</oml:format><oml:url>{dead}/data/{dataset_id}.arff</oml:url>"
        f"<oml:parquet_url>{dead}/dataset_{dataset_id}.pq</oml:parquet_url>"
        "<oml:default_target_attribute>class</oml:default_target_attribute>"
        "<oml:status>active</oml:status></oml:data_set_description>"
    )
    features = []
    for index, column in enumerate(frame.columns):
        if isinstance(frame[column].dtype, pd.CategoricalDtype):
            values = "".join(f"<oml:nominal_value>{escape(str(v))}</oml:nominal_value>"
                             for v in frame[column].cat.categories)
            kind = "nominal"
        else:
            values, kind = "", "numeric"
        features.append(f"<oml:feature><oml:index>{index}</oml:index><oml:name>{column}</oml:name>"
                        f"<oml:data_type>{kind}</oml:data_type>{values}"
                        "<oml:number_of_missing_values>0</oml:number_of_missing_values></oml:feature>")
    (folder / "features.xml").write_text(
        '<oml:data_features xmlns:oml="http://openml.org/openml">' + "".join(features) + "</oml:data_features>")
    frame.to_parquet(folder / f"dataset_{dataset_id}.pq")


def _cut_network(monkeypatch):
    # Route every HTTP(S) request of the openml package (requests and minio,
    # both honour these variables) to a loopback port where nothing listens,
    # so any attempt to reach the network fails at once instead of waiting.
    for variable in ("HTTP_PROXY", "HTTPS_PROXY", "http_proxy", "https_proxy"):
        monkeypatch.setenv(variable, "http://127.0.0.1:9")
    for variable in ("NO_PROXY", "no_proxy"):
        monkeypatch.delenv(variable, raising=False)


def test_openml_adapter_offline_from_a_laid_out_cache(tmp_path, monkeypatch):
    bundled = pd.read_csv(Path(__file__).parents[1] / "src/evenflag/data/files/german_credit.csv.gz")
    raw = bundled.drop(columns=["sex", "age_band"])
    for column in raw.columns:
        if raw[column].dtype == object or str(raw[column].dtype).startswith("str"):
            raw[column] = raw[column].astype("category")
    _write_openml_cache(tmp_path / "openml", raw)
    monkeypatch.setenv("OPENML_CACHE_DIR", str(tmp_path / "openml"))
    _cut_network(monkeypatch)
    ds = load_dataset("openml_credit")
    reference = load_dataset("german_credit")
    assert ds.n_rows == reference.n_rows == 1000
    assert np.array_equal(ds.label, reference.label)
    # Groups are the raw personal_status codes (UCI description); all four have >= 30 rows.
    assert ds.group_counts() == bundled["personal_status"].value_counts().to_dict()
    assert ds.source == "openml:31"


def test_openml_unreachable_gives_one_clear_error(tmp_path, monkeypatch):
    monkeypatch.setenv("OPENML_CACHE_DIR", str(tmp_path / "empty"))
    _cut_network(monkeypatch)
    spec = get_spec("openml_credit")
    spec.source.openml_id = 424242
    with pytest.raises(DatasetError, match="OpenML dataset 424242 could not be loaded"):
        load_dataset(spec)


def test_package_dataset_is_parsed_once_then_read_from_cache(private_cache, capsys):
    ds = load_dataset("rossi")
    parsed = cache.parsed_path("rossi", get_spec("rossi").source.member_sha256)
    assert parsed.exists() and list((private_cache / "wheels").glob("lifelines-*.whl"))
    # The one download says what it fetches and that it happens once.
    assert capsys.readouterr().err.count("evenflag: downloading lifelines==") == 1
    from evenflag.data.registry import forget_loaded

    forget_loaded()
    again = load_dataset("rossi")
    assert np.array_equal(again.label, ds.label)
    assert "downloading" not in capsys.readouterr().err


def test_tampered_cache_is_refused(private_cache):
    load_dataset("rossi")
    parsed = cache.parsed_path("rossi", get_spec("rossi").source.member_sha256)
    pd.read_parquet(parsed).head(10).to_parquet(parsed)
    from evenflag.data.registry import forget_loaded

    forget_loaded()
    with pytest.raises(ChecksumError, match="evenflag datasets clear rossi"):
        load_dataset("rossi")


def test_tampered_wheel_is_refused(private_cache):
    wheels = private_cache / "wheels"
    wheels.mkdir(parents=True)
    (wheels / "lifelines-0.30.3-py3-none-any.whl").write_bytes(b"not the pinned wheel")
    with pytest.raises(ChecksumError, match="does not match the pinned"):
        load_dataset("rossi")


def test_offline_with_empty_cache_says_how_to_fetch(private_cache, monkeypatch):
    # pip with no index reachable: the same failure as a machine offline.
    monkeypatch.setenv("PIP_NO_INDEX", "1")
    monkeypatch.setenv("PIP_FIND_LINKS", "")
    with pytest.raises(FetchError, match="evenflag datasets fetch hmda"):
        load_dataset("hmda")


def test_cli_lists_six_real_datasets_with_row_counts():
    subprocess.run([sys.executable, "-m", "evenflag.cli", "datasets", "fetch"], capture_output=True, check=True)
    result = subprocess.run([sys.executable, "-m", "evenflag.cli", "datasets"], capture_output=True, text=True,
                            env={**os.environ}, check=True)
    # Row counts from each dataset's own documentation: UCI Adult 48,842; UCI Statlog German
    # Credit 1,000; carData Arrests 5,226 and Rossi 432; AER ResumeNames 4,870 and HMDA 2,380.
    for name, rows in {"adult": "48,842", "german_credit": "1,000", "arrests": "5,226", "rossi": "432",
                       "resume": "4,870", "hmda": "2,380"}.items():
        line = next(line for line in result.stdout.splitlines() if line.startswith(name + " "))
        assert rows in line
