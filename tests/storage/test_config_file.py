"""Reading TOML config files: one reader for survey configs and cluster
profiles, with errors that name the file and the key."""

from __future__ import annotations

import pytest

from descatter.storage.cluster_profiles import read_profile
from descatter.storage.config_file import load_config, read_toml
from descatter.tasks.errors import ConfigError, InputNotFoundError


def test_read_toml_parses_a_document(tmp_path):
    path = tmp_path / "a.toml"
    path.write_text('kind = "local"\n[job]\ncores = 4\n')
    assert read_toml(path, missing="unused") == {"kind": "local", "job": {"cores": 4}}


def test_read_toml_missing_file_or_folder_gives_the_callers_message(tmp_path):
    for path in (tmp_path / "nope.toml", tmp_path):
        with pytest.raises(InputNotFoundError, match="^no such thing here$"):
            read_toml(path, missing="no such thing here")


@pytest.mark.parametrize("data", [b"a = = 1\n", b"\xff\xfe = 1\n"])
def test_read_toml_bad_text_names_the_file(tmp_path, data):
    path = tmp_path / "bad.toml"
    path.write_bytes(data)
    with pytest.raises(ConfigError, match=rf"^{path}: not valid TOML \("):
        read_toml(path, missing="unused")


def test_both_file_kinds_keep_their_own_missing_messages(tmp_path):
    with pytest.raises(InputNotFoundError, match="descatter config init"):
        load_config(tmp_path / "nope.toml")
    with pytest.raises(InputNotFoundError, match="no such cluster profile file"):
        read_profile(tmp_path / "nope.toml")
    with pytest.raises(InputNotFoundError, match="no such cluster profile file"):
        read_profile(tmp_path)  # a folder, not a file


def test_a_bad_config_and_a_bad_profile_name_file_and_key(tmp_path):
    config = tmp_path / "survey.toml"
    config.write_text("[analysis]\nband_hz = [50.0, 10.0]\n[ingest]\nchunk_trace = 1\n")
    with pytest.raises(ConfigError) as info:
        load_config(config)
    lines = str(info.value).splitlines()
    assert lines[0] == f"{config}: invalid survey config"
    assert "  - analysis: analysis.band_hz = [50.0, 10.0]: expected 0 <= low < high" in lines
    assert "  - ingest.chunk_trace: unknown key (run 'descatter config init' to see every key)" in lines
    profile = tmp_path / "p.toml"
    profile.write_text('kind = "local"\nworker = 2\nmemory_limit = "4 gigs"\n')
    with pytest.raises(ConfigError) as info:
        read_profile(profile)
    lines = str(info.value).splitlines()
    assert lines[0] == f"{profile}: invalid cluster profile"
    assert any(line.startswith("  - worker: unknown key (expected one of: kind, workers,") for line in lines)
    assert any(line.startswith("  - memory_limit: expected a size with a unit") for line in lines)
