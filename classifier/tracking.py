"""Experiment records in MLflow: parameters, grouped-CV metrics, figures, the model.

The store is MLflow's own default (``sqlite:///mlflow.db`` in the working folder)
unless a tracking URI is given or ``MLFLOW_TRACKING_URI`` is set; a tracking server's
URI works the same way.
"""

from __future__ import annotations

import copy
import json
import tempfile
from pathlib import Path
from typing import Any

import numpy as np

from .labels import BACKGROUND
from .model import TRUSTED_TYPES, CallModel

__all__ = ["log_training_run", "DEFAULT_EXPERIMENT"]

DEFAULT_EXPERIMENT = "callsieve"


def _plots(result: Any, folder: Path) -> list[Path]:
    from sklearn.metrics import precision_recall_curve

    from .plots import confusion_figure, pyplot, save

    plt = pyplot()
    val = result.validation
    classes = val["classes"]
    paths = [
        save(
            confusion_figure(
                np.array(val["overall"]["confusion"]),
                classes,
                classes,
                "decided class (out of fold)",
                "labelled class",
                "Grouped cross-validation: confusion (windows)",
            ),
            folder / "confusion_matrix.png",
        )
    ]

    fig, ax = plt.subplots(figsize=(5.5, 4.5))
    oof = result.model.estimator.oof_proba_
    y = result.examples.y
    for j, c in enumerate(classes):
        if c == BACKGROUND:
            continue
        p, r, _ = precision_recall_curve(y == c, oof[:, j], sample_weight=result.examples.weight)
        ap = val["overall"]["metrics"].get(c, {}).get("average_precision", float("nan"))
        ax.step(r, p, where="post", label=f"{c} (AP {ap:.3f})")
    ax.set_xlabel("recall")
    ax.set_ylabel("precision")
    ax.set_xlim(0, 1)
    ax.set_ylim(0, 1.02)
    ax.legend(fontsize=8, loc="lower left")
    ax.set_title("Grouped cross-validation: precision-recall (windows)", fontsize=10)
    fig.tight_layout()
    paths.append(save(fig, folder / "pr_curves.png"))
    return paths


def descriptor_importances(result: Any, max_rows: int = 3000) -> list[tuple[str, float]]:
    """Permutation importance (drop in log-likelihood) of each descriptor, largest first."""
    from sklearn.inspection import permutation_importance

    ex = result.examples
    rng = np.random.default_rng(0)
    idx = rng.choice(ex.y.size, size=min(max_rows, ex.y.size), replace=False)
    # The final estimator's importances: the fold estimators learned from the same
    # descriptors, and asking all five would multiply the cost of training's summary.
    final = copy.copy(result.model.estimator)
    final.fold_estimators_ = []
    imp = permutation_importance(
        final,
        ex.X[idx],
        ex.y[idx],
        scoring="neg_log_loss",
        n_repeats=3,
        random_state=0,
        sample_weight=ex.weight[idx],
    )
    return sorted(zip(ex.names, imp.importances_mean.tolist(), strict=True), key=lambda t: -t[1])


def log_training_run(
    result: Any,
    model_path: Path,
    tracking_uri: str | None = None,
    experiment: str | None = None,
    register: str | None = None,
    set_names: list[str] | None = None,
) -> dict[str, str]:
    """Record one training run; return ``run_id``, ``experiment_id`` and ``tracking_uri``.

    Logs parameters (model kind and parameters, descriptor settings, example sampling,
    validation), grouped-CV metrics per class and per fold, the confusion matrix and PR
    curves as PNG, descriptor importances, tags naming the training sets, the model file,
    and the estimator in MLflow's sklearn flavour (skops serialisation). ``register``
    registers that model under a name and returns its ``model_version``.
    """
    import logging

    import mlflow
    import mlflow.sklearn

    # MLflow's own INFO lines (table creation, new experiment) are noise on a terminal.
    logging.getLogger("mlflow").setLevel(logging.WARNING)
    if tracking_uri:
        mlflow.set_tracking_uri(tracking_uri)
    name = experiment or DEFAULT_EXPERIMENT
    if mlflow.get_experiment_by_name(name) is None:
        # A store in a named SQLite file keeps its artifacts beside it, not in the
        # working folder (MLflow's own default, kept for its own default store).
        uri = mlflow.get_tracking_uri()
        location = None
        if tracking_uri and uri.startswith("sqlite:///"):
            location = (Path(uri[len("sqlite:///") :]).resolve().parent / "mlartifacts").as_uri()
        mlflow.create_experiment(name, artifact_location=location)
    mlflow.set_experiment(name)
    model: CallModel = result.model
    cfg = result.config.to_dict()
    params = {f"model.{k}": v for k, v in cfg["params"].items()}
    params |= {f"descriptors.{k}": v for k, v in model.settings.to_dict().items()}
    params |= {k: v for k, v in cfg.items() if k not in ("params", "descriptors")}
    params["target"] = model.target or "all labels"
    params["classes"] = ",".join(model.classes)
    params["cv_grouping"] = result.validation.get("grouping", "")
    cascade = model.summary.get("cascade")
    if cascade is not None:
        params["cascade.descriptors"] = ",".join(cascade["descriptors"])
        params["cascade.threshold"] = cascade["threshold"]
        params["cascade.target_recall"] = cascade["target_recall"]
    out: dict[str, str] = {}
    with mlflow.start_run() as run:
        mlflow.log_params({k: str(v) for k, v in params.items()})
        tags = {
            "callsieve.training_sets": json.dumps(set_names or []),
            "callsieve.model_sha256": model.content_sha256,
            "callsieve.deployments": ",".join(sorted({s["deployment"] for s in model.summary["sets"]})),
        }
        verified = model.summary.get("verified")
        if verified:
            # Retraining from verdicts: the parent model and the samples whose verdicts fed it.
            tags["callsieve.parent_models"] = ",".join(verified["parent_models"])
            tags["callsieve.verification_runs"] = ",".join(verified["runs"])
            tags["callsieve.verification_samples"] = ",".join(verified["samples"])
            tags["callsieve.verified_stretches"] = str(verified["stretches"])
        for name, counts in model.summary["examples_per_set"].items():
            tags[f"callsieve.examples.{Path(name).name}"] = json.dumps(counts)
        mlflow.set_tags(tags)
        val = result.validation
        metrics = {}
        for c, m in val["overall"]["metrics"].items():
            for key, value in m.items():
                if key != "examples" and np.isfinite(value):
                    metrics[f"cv_{key.replace('@', '_at_')}.{c}"] = value
        if cascade is not None:
            # The first stage's cost in calls (out of fold) and what it saves.
            metrics |= {f"cascade_recall.{c}": v for c, v in cascade["recall"].items()}
            metrics["cascade_background_rejected"] = cascade["background_rejected"]
        mlflow.log_metrics({k.replace("0.5", "0_5"): v for k, v in metrics.items()})
        for k, fold in enumerate(val["folds"]):
            for c, m in fold["metrics"].items():
                if np.isfinite(m["average_precision"]):
                    mlflow.log_metric(f"fold_average_precision.{c}", m["average_precision"], step=k)
        mlflow.log_metrics({f"seconds_{k}": v for k, v in result.seconds.items()})
        with tempfile.TemporaryDirectory() as tmp:
            folder = Path(tmp)
            for p in _plots(result, folder):
                mlflow.log_artifact(str(p), artifact_path="validation")
            imp = descriptor_importances(result)
            (folder / "descriptor_importances.csv").write_text(
                "descriptor,importance\n" + "".join(f"{n},{v:.6g}\n" for n, v in imp)
            )
            mlflow.log_artifact(str(folder / "descriptor_importances.csv"), artifact_path="validation")
            (folder / "training_summary.json").write_text(json.dumps(model.summary, indent=2, default=str))
            mlflow.log_artifact(str(folder / "training_summary.json"))
        mlflow.log_artifact(str(model_path), artifact_path="callsieve_model")
        trusted = sorted(set(TRUSTED_TYPES))
        # Naming the requirements spares MLflow inferring them (seconds of imports).
        from importlib.metadata import version

        requirements = [f"{pkg}=={version(pkg)}" for pkg in ("callsieve", "scikit-learn", "skops", "numpy")]
        info = mlflow.sklearn.log_model(
            model.estimator,
            name="model",
            serialization_format="skops",
            skops_trusted_types=trusted,
            registered_model_name=register,
            pip_requirements=requirements,
        )
        out = {
            "run_id": run.info.run_id,
            "experiment_id": run.info.experiment_id,
            "tracking_uri": mlflow.get_tracking_uri(),
            "model_uri": info.model_uri,
        }
        if register and getattr(info, "registered_model_version", None) is not None:
            out["model_version"] = str(info.registered_model_version)
    return out
