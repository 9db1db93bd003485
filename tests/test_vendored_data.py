"""The reference posteriors vendored in shared/posteriordb: intact, attributed, found, and refused when damaged.

Source of the checksums: shared/posteriordb/SHA256SUMS, recorded with ``sha256sum`` from the
posteriordb files when they were vendored (FIPS 180-4 SHA-256, computed here by :mod:`hashlib`).
"""

from __future__ import annotations

import hashlib
import pathlib
import shutil

import pytest

from stein_torch.benchmarks import accuracy, reference_data

from posteriordb import NAMES

SHARED = pathlib.Path(__file__).resolve().parent.parent / "shared" / "posteriordb"


def test_every_vendored_file_matches_the_checksum_recorded_at_vendoring():
    recorded = reference_data.read_checksums(SHARED)
    expected_files = {f"{name}/{file}" for name in NAMES for file in reference_data.FILES}
    assert set(recorded) == expected_files  # the record covers every file the code reads, and only those
    for relative, digest in recorded.items():
        assert hashlib.sha256((SHARED / relative).read_bytes()).hexdigest() == digest, relative


def test_licence_and_attribution_travel_with_the_data():
    # posteriordb is distributed under BSD-3-Clause, whose condition 1 asks that the notice and licence
    # text be kept with redistributed copies (SPDX BSD-3-Clause text)
    licence = (SHARED / "LICENSE").read_text()
    assert "posteriordb" in licence and "Redistribution and use in source and binary forms" in licence
    readme = (SHARED / "README.md").read_text()
    assert "posteriordb" in readme and "BSD-3" in readme


def test_the_loader_finds_the_vendored_copy_without_any_setting(monkeypatch):
    monkeypatch.delenv(reference_data.ENV_VAR, raising=False)
    assert reference_data.locate() == SHARED.resolve()
    assert reference_data.verify() == SHARED.resolve()


@pytest.fixture
def copy_of_the_data(tmp_path):
    target = tmp_path / "posteriordb"
    shutil.copytree(SHARED, target)
    for path in target.rglob("*"):
        path.chmod(0o644 if path.is_file() else 0o755)
    reference_data._verified.cache_clear()  # the checks are cached per folder and file
    yield target
    reference_data._verified.cache_clear()


def test_a_damaged_file_is_refused_with_its_name(copy_of_the_data, monkeypatch, capsys):
    damaged = copy_of_the_data / "arK-arK" / "reference_draws.json.zip"
    content = bytearray(damaged.read_bytes())
    content[200] ^= 0xFF  # one flipped byte: SHA-256 differs (any change does, FIPS 180-4)
    damaged.write_bytes(bytes(content))
    with pytest.raises(reference_data.ReferenceDataError, match="arK-arK/reference_draws.json.zip is damaged"):
        reference_data.load_reference("arK-arK", copy_of_the_data)
    monkeypatch.setenv(reference_data.ENV_VAR, str(copy_of_the_data))
    with pytest.raises(SystemExit) as exit_info:
        accuracy.main(["--quick"])
    assert exit_info.value.code == 2
    assert "arK-arK/reference_draws.json.zip is damaged" in capsys.readouterr().err


def test_a_missing_file_and_a_missing_folder_are_named(copy_of_the_data, tmp_path):
    (copy_of_the_data / "garch-garch11" / "data.json.zip").unlink()
    with pytest.raises(reference_data.ReferenceDataError, match="garch-garch11/data.json.zip is missing"):
        reference_data.verify(copy_of_the_data)
    with pytest.raises(reference_data.ReferenceDataError, match="not found; looked in .*absent"):
        reference_data.locate(tmp_path / "absent")


def test_an_unrecorded_folder_still_reports_an_unreadable_file(copy_of_the_data):
    # a copy elsewhere (STEIN_TORCH_POSTERIORS) may have no SHA256SUMS; a broken zip is then named
    (copy_of_the_data / "SHA256SUMS").unlink()
    (copy_of_the_data / "kidiq-kidscore_momhsiq" / "data.json.zip").write_bytes(b"not a zip archive")
    with pytest.raises(reference_data.ReferenceDataError, match="kidiq-kidscore_momhsiq/data.json.zip is unreadable"):
        reference_data.load_data("kidiq-kidscore_momhsiq", copy_of_the_data)
