"""The ``boxwood demo`` walk-through on the invented cold-room data (samples/generate.py).

It trains three scikit-learn models, exports them, loads the artefacts with the
device scorer, compares the device's raw scores with scikit-learn's own on every
row, and scores a small CSV through the streaming scorer. The data are made up
(see samples/README.md); the comparison is real.

The sample generator lives in the repository's top-level ``samples/`` folder, not
in the installed package, so the demo needs a source checkout.
"""
import importlib.util
import struct
import tempfile
from pathlib import Path

DEFAULT_ROWS = 4000
SAMPLE_ROWS = 6


class DemoError(ValueError):
    """The demo cannot run here (e.g. no source checkout)."""


def samples_generator():
    """The module samples/generate.py of this source checkout.

    Loaded from its path rather than as ``import samples.generate``: "samples" is a
    common package name, and loading by path cannot pick up somebody else's.
    """
    root = Path(__file__).resolve().parents[2]  # exporter/boxwood/demo.py -> repository root
    path = root / "samples" / "generate.py"
    if not path.is_file():
        raise DemoError("the demo needs a source checkout of boxwood: it uses samples/generate.py "
                        "from the repository, which is not at %s" % path)
    spec = importlib.util.spec_from_file_location("boxwood_demo_samples_generate", str(path))
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


def _same_bits(a, b):
    return struct.pack("<d", a) == struct.pack("<d", b)


def run(out_dir=None, rows=DEFAULT_ROWS, echo=print):
    """Run the demo, writing files to ``out_dir`` (default: a new temporary directory).

    Returns 0 when every device raw score equals scikit-learn's bit for bit (and the
    classifier's labels agree and its probabilities are within the scorer's stated
    bound), else 1.
    """
    gen = samples_generator()
    import pandas as pd
    from sklearn.ensemble import (
        GradientBoostingRegressor,
        HistGradientBoostingClassifier,
        HistGradientBoostingRegressor,
    )

    import boxwood_runtime
    from boxwood_runtime.scorer import SELF_CHECK_ULPS, ulp_distance
    from boxwood_runtime.stream import score_stream

    from .export import build
    from .writers import json_artefact

    out = Path(out_dir) if out_dir else Path(tempfile.mkdtemp(prefix="boxwood-demo-"))
    out.mkdir(parents=True, exist_ok=True)
    counter = [0]

    def step(text):
        counter[0] += 1
        echo("%d. %s" % (counter[0], text))

    echo("boxwood demo: invented cold-room data (made up for this demo; no real site). Files go to %s"
         % out)

    # -- data ---------------------------------------------------------------------
    step("Generate the data: %d hourly readings, seed %d (samples/generate.py)" % (rows, gen.DEFAULT_SEED))
    frame = gen.make_frame(n_rows=rows, seed=gen.DEFAULT_SEED)
    X = frame[gen.FEATURES].copy()
    X["room_type"] = X["room_type"].astype("category")
    missing = ", ".join("%s %d" % (c, n) for c, n in X.isna().sum().items() if n)
    echo("   features: %s" % ", ".join(gen.FEATURES))
    echo("   missing readings (NaN): %s" % (missing or "none"))
    y_temp = frame[gen.TARGET_REGRESSION].to_numpy(dtype=float)
    y_defrost = frame[gen.TARGET_CLASSIFICATION].to_numpy()

    # -- training -----------------------------------------------------------------
    step("Train HistGradientBoostingRegressor for %s (room_type as a native categorical "
         "with string categories; NaN routed by the trees)" % gen.TARGET_REGRESSION)
    hgbr = HistGradientBoostingRegressor(max_iter=100, categorical_features="from_dtype",
                                         random_state=0).fit(X, y_temp)
    echo("   %d boosting iterations" % hgbr.n_iter_)

    step("Train HistGradientBoostingClassifier for %s" % gen.TARGET_CLASSIFICATION)
    hgbc = HistGradientBoostingClassifier(max_iter=100, categorical_features="from_dtype",
                                          random_state=0).fit(X, y_defrost)
    echo("   %d boosting iterations; classes %s" % (hgbc.n_iter_, hgbc.classes_.tolist()))

    step("Train a classic GradientBoostingRegressor for %s on numerically coded data "
         "(the float32 comparison path)" % gen.TARGET_REGRESSION)
    complete = ~frame[gen.FEATURES].isna().any(axis=1).to_numpy()
    coded_names = ["room_type_code"] + gen.FEATURES[1:]
    Xc = pd.DataFrame(gen.numeric_matrix(frame)[complete], columns=coded_names)
    gbr = GradientBoostingRegressor(n_estimators=100, max_depth=3, random_state=0).fit(Xc, y_temp[complete])
    echo("   room_type coded %s; trained and compared on the %d of %d rows with no missing "
         "reading (impute-free rows only: boxwood's classic-tree export refuses missing values, "
         "and the demo does not impute)" % (
             ", ".join("%s=%d" % (r, i) for i, r in enumerate(gen.ROOM_TYPES)), len(Xc), rows))

    # -- export -------------------------------------------------------------------
    jobs = [
        ("next_hour_temp_hgb", hgbr, X, "regression"),
        ("defrost_needed_hgb", hgbc, X, "classification"),
        ("next_hour_temp_gb_float32", gbr, Xc, "regression"),
    ]
    step("Export each model to a boxwood artefact")
    paths = {}
    for name, model, _, _ in jobs:
        path = out / (name + ".json")
        ensemble = build(model)
        size = json_artefact.write(ensemble, path)
        paths[name] = path
        echo("   %-28s %d trees, %d nodes, %d bytes -> %s" % (
            name, len(ensemble.trees), ensemble.n_nodes, size, path.name))

    # -- load ---------------------------------------------------------------------
    step("Load each artefact with boxwood_runtime (standard library only; digest checked, "
         "self-check rows re-scored)")
    devices = {}
    for name, _, _, _ in jobs:
        devices[name] = boxwood_runtime.load(str(paths[name]))
        echo("   %-28s %s" % (name, devices[name].self_check()[1]))

    # -- compare ------------------------------------------------------------------
    step("Compare the device's raw scores with scikit-learn's on every row")
    all_ok = True
    for name, model, data, task in jobs:
        device = devices[name]
        # scikit-learn's own numbers on the user's own frame: predict for the
        # identity-link regressors, decision_function for the classifier.
        theirs = model.decision_function(data) if task == "classification" else model.predict(data)
        records = data.to_dict("records")  # NaN stays NaN: the scorer reads it as missing
        mine = [device.decision_function(r) for r in records]
        worst = 0.0
        identical = True
        for a, b in zip(mine, theirs.tolist()):
            worst = max(worst, abs(a - b))
            identical = identical and _same_bits(a, b)
        all_ok = all_ok and identical
        echo("   %-28s max |difference| = %r over %d rows (bit-identical: %s)"
             % (name, worst, len(records), "yes" if identical else "NO"))
        if task == "classification":
            labels = model.predict(data).tolist()
            proba = model.predict_proba(data).tolist()
            agree = sum(1 for r, want in zip(mine, labels) if device.classes[device.class_index([r])] == want)
            ulps = max(ulp_distance(a, b) for r, want in zip(records, proba)
                       for a, b in zip(device.predict_proba(r), want))
            within = ulps <= SELF_CHECK_ULPS
            all_ok = all_ok and within and agree == len(labels)
            echo("   %-28s labels agree on %d of %d rows; probabilities within %d ulp (bound %d)"
                 % ("", agree, len(labels), ulps, SELF_CHECK_ULPS))

    # -- stream -------------------------------------------------------------------
    step("Score a sample CSV through the streaming scorer (boxwood_runtime.stream)")
    sample = frame.head(SAMPLE_ROWS).copy()
    sample.loc[sample.index[-1], "room_type"] = "walk_in"
    csv_path = out / "sample_readings.csv"
    gen.write_csv(sample, str(csv_path))
    echo("   wrote %d rows to %s; the last row has room_type 'walk_in' on purpose, to show an "
         "error row" % (len(sample), csv_path.name))
    for name in ("next_hour_temp_hgb", "defrost_needed_hgb"):
        scored = out / ("sample_scored_%s.csv" % name)
        with open(csv_path, newline="", encoding="utf-8") as src, \
                open(scored, "w", newline="", encoding="utf-8") as dst:
            counts = score_stream(devices[name], src, dst, id_column="reading_id")
        echo("   %s -> %s: %d rows read, %d scored, %d with an error:"
             % (name, scored.name, counts.rows, counts.scored, counts.errors))
        with open(scored, encoding="utf-8") as fh:
            for line in fh:
                echo("     " + line.rstrip("\n"))

    # -- where --------------------------------------------------------------------
    step("Files")
    for path in sorted(out.iterdir()):
        if path.is_file():
            echo("   %8d  %s" % (path.stat().st_size, path))
    echo("   try: boxwood inspect %s" % paths["next_hour_temp_hgb"])
    echo("        boxwood score %s %s --id-column reading_id" % (paths["defrost_needed_hgb"], csv_path))
    echo("all device raw scores bit-identical to scikit-learn: %s" % ("yes" if all_ok else "NO"))
    return 0 if all_ok else 1
