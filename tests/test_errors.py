"""The exceptions module: one-line messages, the attributes callers read, the caps on user text."""

import pytest

from linz_ros.errors import (MAX_MESSAGE, ArtifactError, ConfigError, DesignError, LinzError, PlantFileError,
                             quoted)


def test_an_artifact_error_names_the_file_and_keeps_its_parts():
    err = ArtifactError("build/arm.artifact.json", "sha256: missing; the file is not sealed")
    assert str(err) == "build/arm.artifact.json: sha256: missing; the file is not sealed"
    assert (err.source, err.problem) == ("build/arm.artifact.json", "sha256: missing; the file is not sealed")
    assert isinstance(err, LinzError) and isinstance(err, ValueError)
    assert not hasattr(err, "field")


def test_a_config_error_names_the_setting_and_keeps_its_parts():
    err = ConfigError("--mismatch", "expected name=factor")
    assert str(err) == "--mismatch: expected name=factor"
    assert (err.field, err.problem) == ("--mismatch", "expected name=factor")
    assert not hasattr(err, "source")
    with pytest.raises(ValueError, match=r"^--mismatch: expected name=factor$"):
        raise err


def test_a_long_name_is_quoted_short_and_a_long_message_is_cut():
    err = ArtifactError("x" * 500, "bad")
    assert str(err) == f"{quoted('x' * 500)}: bad" and "(500 characters)" in str(err)
    assert len(str(ConfigError("k", "y" * 5000))) < MAX_MESSAGE + 40


@pytest.mark.parametrize("cls", [PlantFileError, DesignError])
def test_located_errors_name_source_field_and_problem(cls):
    err = cls("plant.yaml", "dynamics.x2", "unknown symbol 'q'")
    assert str(err) == "plant.yaml: dynamics.x2: unknown symbol 'q'"
    assert str(cls("plant.yaml", "", "no such file")) == "plant.yaml: no such file"
