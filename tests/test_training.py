"""Training: examples from labels, grouped CV, the model file, the experiment record."""

from __future__ import annotations

import csv
from pathlib import Path

import numpy as np
import pytest
from callsieve.classifier.cli import main
from callsieve.classifier.config import DEFAULT_PARAMS, TrainingConfig, load_training_config
from callsieve.classifier.errors import InputError
from callsieve.classifier.labels import Annotation
from callsieve.classifier.model import load_model
from callsieve.classifier.training import choose_settings, train

REPO = Path(__file__).resolve().parents[1]


def test_training_reaches_clear_average_precision(labelled, trained):
    manifest, labels, config = labelled
    path, report = trained
    assert set(report["classes"]) == {"background", "down", "up"}
    # Grouped out-of-fold AP (scikit-learn's average_precision_score); chance is the share
    # of each class among the weighted windows, far below 0.5.
    assert report["cv"]["up"]["average_precision"] > 0.8
    assert report["cv"]["down"]["average_precision"] > 0.8
    assert report["cv_folds"] == 3
    model = load_model(path)
    assert model.settings.low_hz < 80 and model.settings.high_hz > 165
    assert model.summary["examples_per_set"][str(labels)]["up"] > 50


def test_binary_target_treats_other_labels_as_background(labelled, tmp_path):
    manifest, labels, config = labelled
    report = train([manifest], [labels], tmp_path / "up.skops", config_path=config, target="up", track=False)
    assert report["classes"] == ["background", "up"]
    assert report["cv"]["up"]["average_precision"] > 0.8
    with pytest.raises(InputError, match="not a label"):
        train([manifest], [labels], tmp_path / "x.skops", config_path=config, target="sideways", track=False)


def _write_rows(path, header, rows):
    path.write_text(",".join(header) + "\n" + "".join(",".join(map(str, r)) + "\n" for r in rows))


@pytest.mark.parametrize(
    "header,rows,expected",
    [
        (["file", "start_s", "end_s", "label"], [["{f}", 3.0, 4.0, "up"], ["{f}", 5.0, 4.5, "up"]], "row 3"),
        (["file", "start_s", "end_s", "label"], [["nofile.wav", 3.0, 4.0, "up"]], "row 2"),
        (["file", "start_s", "label"], [["{f}", 3.0, "up"]], "end_s"),
        (
            ["file", "start_s", "end_s", "label"],
            [["{f}", 3.0, 4.0, "up"], ["{f}", "abc", 4.0, "up"]],
            "row 3",
        ),
        (["file", "start_s", "end_s", "label"], [["{f}", 3.0, 9999.0, "up"]], "past the end"),
    ],
)
def test_bad_label_table_gives_exit_2_with_the_row(labelled, tmp_path, capsys, header, rows, expected):
    manifest, labels, config = labelled
    first = next(csv.DictReader(open(labels)))["file"]
    bad = tmp_path / "bad.csv"
    _write_rows(bad, header, [[str(v).format(f=first) for v in r] for r in rows])
    code = main(
        [
            "train",
            "--deployment",
            str(manifest),
            "--labels",
            str(bad),
            "--out",
            str(tmp_path / "m"),
            "--config",
            str(config),
            "--quiet",
        ]
    )
    err = capsys.readouterr().err
    assert code == 2 and err.startswith("callsieve: error: ") and err.count("\n") == 1
    assert expected in err and "bad.csv" in err


@pytest.fixture(scope="module")
def trained(labelled, tmp_path_factory):
    manifest, labels, config = labelled
    path = tmp_path_factory.mktemp("model") / "m.skops"
    return path, train([manifest], [labels], path, config_path=config, track=False)


def test_model_file_round_trip_and_refusals(trained, tmp_path):
    path, _ = trained
    model = load_model(path)
    x = np.random.default_rng(0).normal(size=(5, len(model.descriptor_names))).astype(np.float32)
    again = load_model(path)
    np.testing.assert_array_equal(model.estimator.predict_proba(x), again.estimator.predict_proba(x))
    # The band must fit below the data's Nyquist frequency.
    with pytest.raises(InputError, match="Nyquist"):
        model.check_fits(200.0, "site")
    # An altered file is refused.
    data = bytearray(path.read_bytes())
    tampered = tmp_path / "t.skops"
    import skops.io as sio

    payload = sio.loads(bytes(data), trusted=[])
    payload["metadata"] = payload["metadata"].replace('"target": null', '"target": "up"')
    sio.dump(payload, tampered)
    with pytest.raises(InputError, match="hash"):
        load_model(tampered)
    # A file holding a type outside the trusted list is refused before anything is built.
    evil = tmp_path / "evil.skops"
    sio.dump({"estimator": sio.dumps(Path("/tmp")), "metadata": "{}", "content_sha256": ""}, evil)
    with pytest.raises(InputError, match="does not trust"):
        load_model(evil)
    with pytest.raises(InputError, match="no such model"):
        load_model(tmp_path / "none.skops")


def test_training_run_is_recorded_in_mlflow(labelled, tmp_path):
    import mlflow

    manifest, labels, config = labelled
    uri = f"sqlite:///{tmp_path / 'track.db'}"
    report = train(
        [manifest],
        [labels],
        tmp_path / "m.skops",
        config_path=config,
        tracking_uri=uri,
        experiment="sweeps",
        register="sweep-detector",
    )
    client = mlflow.MlflowClient(tracking_uri=uri)
    run = client.get_run(report["run"]["run_id"])
    assert run.data.params["kind"] == "gradient-boosting" and run.data.params["model.max_iter"] == "60"
    assert run.data.params["descriptors.low_hz"] == str(report["settings"]["low_hz"])
    assert run.data.metrics["cv_average_precision.up"] == pytest.approx(report["cv"]["up"]["average_precision"])
    assert str(labels) in run.data.tags["callsieve.training_sets"]
    arts = {a.path for a in client.list_artifacts(run.info.run_id, "validation")}
    assert {
        "validation/confusion_matrix.png",
        "validation/pr_curves.png",
        "validation/descriptor_importances.csv",
    } <= arts
    versions = client.search_model_versions("name='sweep-detector'")
    assert len(versions) == 1
    loaded = mlflow.sklearn.load_model(report["run"]["model_uri"])
    x = np.zeros((2, len(load_model(tmp_path / "m.skops").descriptor_names)), dtype=np.float32)
    assert loaded.predict_proba(x).shape == (2, 3)


def test_shipped_configs_are_the_documented_defaults():
    gb = load_training_config(REPO / "configs" / "gradient-boosting.toml")
    assert gb.to_dict() == TrainingConfig().to_dict()
    rf = load_training_config(REPO / "configs" / "random-forest.toml")
    assert rf.kind == "random-forest" and rf.estimator_params == DEFAULT_PARAMS["random-forest"]
    assert gb.estimator_params == DEFAULT_PARAMS["gradient-boosting"]


def test_settings_chosen_from_labels_cover_the_calls():
    notes = [Annotation("d", "f", 0.0, d, "x", 80.0, 160.0, 2) for d in (0.8, 1.0, 1.2, 1.4)]
    s = choose_settings(notes, 2000)
    assert s.low_hz < 80.0 < 160.0 < s.high_hz < 1000.0
    assert s.window_s >= 1.4
    assert s.frames_per_window >= 8
    assert abs(s.window_hop_s / s.frame_hop_s - round(s.window_hop_s / s.frame_hop_s)) < 1e-9
