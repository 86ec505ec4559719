"""Bad input gets one clear line naming the problem and the fix."""

import os
import subprocess
import sys

import numpy as np
import pandas as pd
import pytest

from evenflag.data.protocol import ProtocolSpec, make_split
from evenflag.data.registry import load_dataset
from evenflag.errors import DatasetError, EvenflagError, ProtocolError, UnknownNameError


def _file_spec(path):
    return {"name": "my_claims", "source": {"kind": "file", "path": str(path)}, "label": "outcome",
            "anomaly_values": ["fraud"], "group": ["region"]}


def _claims(tmp_path, frame, name="claims.csv"):
    path = tmp_path / name
    frame.to_csv(path, index=False)
    return _file_spec(path)


@pytest.fixture
def frame():
    rng = np.random.default_rng(0)
    return pd.DataFrame({"amount": rng.normal(size=200), "region": rng.choice(["north", "south"], 200),
                         "outcome": np.where(rng.random(200) < 0.1, "fraud", "ok")})


def test_missing_group_column_lists_columns(tmp_path, frame):
    spec = _claims(tmp_path, frame)
    spec["group"] = ["county"]
    with pytest.raises(DatasetError, match=r"group column 'county' not found; available columns: \['amount', 'region', 'outcome'\]"):
        load_dataset(spec)


def test_missing_label_column_lists_columns(tmp_path, frame):
    spec = _claims(tmp_path, frame)
    spec["label"] = "result"
    with pytest.raises(DatasetError, match="label column 'result' not found; available columns"):
        load_dataset(spec)


def test_anomaly_values_absent(tmp_path, frame):
    spec = _claims(tmp_path, frame)
    spec["anomaly_values"] = ["Fraud!"]
    with pytest.raises(DatasetError, match=r"none of the anomaly values \['Fraud!'\] occur in column 'outcome'; values present: \['fraud', 'ok'\]"):
        load_dataset(spec)


def test_single_group_value(tmp_path, frame):
    frame["region"] = "north"
    with pytest.raises(DatasetError, match="single value"):
        load_dataset(_claims(tmp_path, frame))


def test_nan_in_group_column(tmp_path, frame):
    frame.loc[3, "region"] = None
    with pytest.raises(DatasetError, match="group column 'region' has 1 missing values"):
        load_dataset(_claims(tmp_path, frame))


def test_empty_file(tmp_path):
    path = tmp_path / "claims.csv"
    path.write_text("")
    spec = _file_spec(path)
    with pytest.raises(DatasetError, match="is empty"):
        load_dataset(spec)


def test_unreadable_parquet(tmp_path):
    path = tmp_path / "claims.parquet"
    path.write_bytes(b"this is not parquet")
    spec = _file_spec(path)
    with pytest.raises(DatasetError, match=r"could not parse parquet data \(.*magic bytes.*\).*read as parquet"):
        load_dataset(spec)


def test_missing_file(tmp_path):
    spec = _file_spec(tmp_path / "nope.csv")
    with pytest.raises(DatasetError, match="does not exist"):
        load_dataset(spec)


def test_small_group_refused_or_merged(tmp_path, frame):
    frame.loc[:4, "region"] = "islands"
    spec = _claims(tmp_path, frame)
    spec["min_group_size"] = 10
    with pytest.raises(DatasetError, match=r"below min_group_size=10: \{'islands': 5\}; set dataset.small_groups=merge"):
        load_dataset(spec)
    spec["small_groups"] = "merge"
    with pytest.warns(UserWarning):
        ds = load_dataset(spec)
    assert ds.merged_groups == ["islands"] and ds.group_counts()["other"] == 5


def test_unknown_dataset_name_lists_valid_names():
    with pytest.raises(UnknownNameError, match="unknown dataset 'adlut'; valid names: adult, "):
        load_dataset("adlut")


def test_misspelt_config_key():
    with pytest.raises(EvenflagError, match="labels"):
        load_dataset({"name": "x", "labels": "y"})


def test_test_set_without_anomalies(tmp_path, frame):
    frame["outcome"] = "ok"
    frame.loc[0, "outcome"] = "fraud"
    ds = load_dataset(_claims(tmp_path, frame))
    # One anomaly: a 30% test split of a single row rounds to zero test anomalies.
    with pytest.raises(ProtocolError, match="the test set has no anomalies after subsampling; raise protocol.test_anomaly_rate"):
        make_split(ds, ProtocolSpec(test_fraction=0.3), seed=0)


def test_bad_protocol_values():
    ds = load_dataset("german_credit")
    with pytest.raises(ProtocolError, match="protocol.kind 'oneclass' is unknown"):
        make_split(ds, ProtocolSpec(kind="oneclass"), seed=0)
    with pytest.raises(ProtocolError, match="test_fraction must be between 0 and 1"):
        make_split(ds, ProtocolSpec(test_fraction=1.5), seed=0)


def test_cli_prints_one_line_without_traceback(tmp_path, frame):
    result = subprocess.run([sys.executable, "-m", "evenflag.cli", "datasets", "show", "adlut"],
                            capture_output=True, text=True, env={**os.environ})
    assert result.returncode == 2
    assert result.stderr.strip().count("\n") == 0
    assert "Traceback" not in result.stderr and "valid names" in result.stderr


# Each rule below is stated in evenflag.data.dataset.check_features; the data
# are invented for these checks.
def test_numbers_with_stray_text_are_refused_with_count(tmp_path, frame):
    frame["amount"] = frame["amount"].round(3).astype(object)
    frame.loc[:9, "amount"] = "?"
    with pytest.raises(DatasetError, match=r"column 'amount' holds numbers but also text in 10 row\(s\) \(values: '\?'\); list that text in dataset.na_values"):
        load_dataset(_claims(tmp_path, frame))


def test_stray_text_listed_as_missing_is_filled_with_one_warning(tmp_path, frame, capsys):
    frame["amount"] = frame["amount"].round(3).astype(object)
    frame.loc[:9, "amount"] = "?"
    spec = _claims(tmp_path, frame)
    spec["na_values"] = ["?"]
    dataset = load_dataset(spec)
    assert dataset.features.shape[1] == 1 and dataset.missing_values == {"amount": 10}
    err = capsys.readouterr().err
    assert "10 missing value(s) in 1 feature column(s) (amount: 10) are filled" in err and err.count("\n") == 1


def test_infinite_numbers_are_refused_with_count(tmp_path, frame):
    frame.loc[[3, 7, 11], "amount"] = np.inf
    with pytest.raises(DatasetError, match=r"column 'amount' has 3 infinite value\(s\)"):
        load_dataset(_claims(tmp_path, frame))


def test_duplicated_group_header_is_refused(tmp_path, frame):
    path = tmp_path / "claims.csv"
    # pandas renames the second 'region' header to 'region.1' (pandas.read_csv documentation, mangle_dupe_cols)
    frame[["amount", "region", "region", "outcome"]].to_csv(path, index=False)
    spec = _file_spec(path)
    with pytest.raises(DatasetError, match=r"feature column 'region.1' repeats group column 'region'.*dataset.drop=\[region.1\]"):
        load_dataset(spec)


def test_directory_as_data_path(tmp_path):
    spec = _file_spec(tmp_path)
    with pytest.raises(DatasetError, match=r"is a folder; set source.path to a file in it \(.csv, .csv.gz, .parquet\)"):
        load_dataset(spec)


def test_unsupported_format_names_the_supported_ones(tmp_path, frame):
    path = tmp_path / "claims.xlsx"
    path.write_bytes(b"PK\x03\x04 not really a spreadsheet")
    spec = _file_spec(path)
    with pytest.raises(DatasetError, match=r"cannot tell the format of 'claims.xlsx'.*supported: .csv, .csv.gz, .parquet"):
        load_dataset(spec)


def test_latin1_file_names_the_encoding_option(tmp_path, frame):
    frame["region"] = np.where(frame["region"] == "north", "Nordm\u00e4rkte", "S\u00fcd")
    path = tmp_path / "claims.csv"
    frame.to_csv(path, index=False, encoding="latin-1")
    spec = _file_spec(path)
    with pytest.raises(DatasetError, match=r"not utf-8 text \(byte 0x[0-9a-f]{2} at position \d+\); set dataset.source.encoding"):
        load_dataset(spec)
    spec["source"]["encoding"] = "latin-1"
    assert sorted(load_dataset(spec).group_counts()) == ["Nordm\u00e4rkte", "S\u00fcd"]


def test_group_value_names_must_name_every_value(tmp_path, frame):
    frame["region"] = np.where(frame["region"] == "north", 1, 2)
    spec = _claims(tmp_path, frame)
    spec["group_value_names"] = {"region": {"1": "north"}}
    with pytest.raises(DatasetError, match=r"group column 'region' has values \['2'\] without a name in group_value_names.region"):
        load_dataset(spec)
    spec["group_value_names"] = {"region": {"1": "north", "2": "south"}}
    assert sorted(load_dataset(spec).group_counts()) == ["north", "south"]
