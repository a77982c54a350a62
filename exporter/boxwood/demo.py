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
# Model kinds the demo can train (``run(models=...)``, ``boxwood demo --models``).
# "boosting" is the default trio: histogram regressor and classifier, classic regressor.
MODEL_KINDS = {
    "boosting": "histogram boosting (regressor, classifier) and a classic float32 regressor",
    "forest": "a random forest for next-hour temperature (NaN routed by the trees)",
    "tree": "one decision tree for defrost-needed, small enough to read",
    "isolation": "an isolation forest that flags unusual sensor readings on the box",
    "adaboost": "AdaBoost (SAMME) over shallow trees for defrost-needed",
    "pipeline": "a Pipeline that imputes and encodes raw readings (room_type as text) before boosting",
}
DEFAULT_MODELS = ("boosting",)


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


def run(out_dir=None, rows=DEFAULT_ROWS, echo=print, models=DEFAULT_MODELS):
    """Run the demo, writing files to ``out_dir`` (default: a new temporary directory).

    Returns 0 when every device raw score equals scikit-learn's bit for bit (and the
    classifier's labels agree and its probabilities are within the scorer's stated
    bound), else 1. ``models`` names kinds from MODEL_KINDS ("all" for every one).
    """
    models = tuple(MODEL_KINDS) if "all" in models else tuple(models)
    unknown = [m for m in models if m not in MODEL_KINDS]
    if unknown:
        raise DemoError("unknown demo model kind(s) %s; choose from %s, or all"
                        % (", ".join(unknown), ", ".join(MODEL_KINDS)))
    gen = samples_generator()
    import pandas as pd

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
    jobs = []
    complete = ~frame[gen.FEATURES].isna().any(axis=1).to_numpy()
    coded_names = ["room_type_code"] + gen.FEATURES[1:]
    coded = pd.DataFrame(gen.numeric_matrix(frame), columns=coded_names)  # NaN kept
    if "boosting" in models:
        jobs += _train_boosting(gen, step, echo, X, coded, complete, y_temp, y_defrost, rows)
    jobs += _train_others(gen, step, echo, models, frame, coded, complete, y_temp, y_defrost)
    return _export_compare_stream(gen, step, echo, out, frame, jobs)


def _train_boosting(gen, step, echo, X, coded, complete, y_temp, y_defrost, rows):
    from sklearn.ensemble import (
        GradientBoostingRegressor,
        HistGradientBoostingClassifier,
        HistGradientBoostingRegressor,
    )

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
    Xc = coded[complete].reset_index(drop=True)
    gbr = GradientBoostingRegressor(n_estimators=100, max_depth=3, random_state=0).fit(Xc, y_temp[complete])
    echo("   room_type coded %s; trained and compared on the %d of %d rows with no missing "
         "reading (impute-free rows only: boxwood's classic-tree export refuses missing values, "
         "and the demo does not impute)" % (
             ", ".join("%s=%d" % (r, i) for i, r in enumerate(gen.ROOM_TYPES)), len(Xc), rows))

    return [
        ("next_hour_temp_hgb", hgbr, X, "regression"),
        ("defrost_needed_hgb", hgbc, X, "classification"),
        ("next_hour_temp_gb_float32", gbr, Xc, "regression"),
    ]


def _train_others(gen, step, echo, models, frame, coded, complete, y_temp, y_defrost):
    """Train the non-default kinds the user asked for; return their export jobs."""
    from sklearn.compose import ColumnTransformer
    from sklearn.ensemble import (
        AdaBoostClassifier,
        GradientBoostingClassifier,
        IsolationForest,
        RandomForestRegressor,
    )
    from sklearn.impute import SimpleImputer
    from sklearn.pipeline import make_pipeline
    from sklearn.preprocessing import OrdinalEncoder
    from sklearn.tree import DecisionTreeClassifier

    jobs = []
    if "forest" in models:
        step("Train a RandomForestRegressor for %s on coded data with NaN (missing readings routed "
             "by the trees)" % gen.TARGET_REGRESSION)
        forest = RandomForestRegressor(n_estimators=40, max_depth=8, random_state=0, n_jobs=None)
        jobs.append(("next_hour_temp_forest", forest.fit(coded, y_temp), coded, "regression"))
    if "tree" in models:
        step("Train one DecisionTreeClassifier (depth 4) for %s" % gen.TARGET_CLASSIFICATION)
        tree = DecisionTreeClassifier(max_depth=4, random_state=0).fit(coded, y_defrost)
        jobs.append(("defrost_needed_tree", tree, coded, "classification"))
    if "isolation" in models:
        step("Train an IsolationForest on the readings (flags unusual readings: -1 outlier, 1 inlier)")
        iso = IsolationForest(n_estimators=100, random_state=0).fit(coded)
        flagged = int((iso.predict(coded) == -1).sum())
        echo("   %d of %d readings flagged as unusual" % (flagged, len(coded)))
        jobs.append(("unusual_reading_isolation", iso, coded, "outlier_detection"))
    if "adaboost" in models:
        Xc = coded[complete].reset_index(drop=True)
        step("Train AdaBoostClassifier (SAMME, trees of depth 2) for %s on the %d complete rows"
             % (gen.TARGET_CLASSIFICATION, len(Xc)))
        ada = AdaBoostClassifier(DecisionTreeClassifier(max_depth=2), n_estimators=50, random_state=0)
        jobs.append(("defrost_needed_adaboost", ada.fit(Xc, y_defrost[complete]), Xc, "classification"))
    if "pipeline" in models:
        raw = frame[gen.FEATURES].copy()  # room_type stays text; NaN for missing readings
        numeric = gen.FEATURES[1:]
        step("Train a Pipeline for %s: room_type ordinal-encoded from text (unknown rooms -> -1), "
             "missing readings imputed by the median, then classic boosting" % gen.TARGET_CLASSIFICATION)
        pre = ColumnTransformer([
            ("room", OrdinalEncoder(handle_unknown="use_encoded_value", unknown_value=-1), ["room_type"]),
            ("readings", SimpleImputer(strategy="median"), numeric),
        ])
        pipe = make_pipeline(pre, GradientBoostingClassifier(n_estimators=60, max_depth=3, random_state=0))
        jobs.append(("defrost_needed_pipeline", pipe.fit(raw, y_defrost), raw, "classification"))
    return jobs


def _export_compare_stream(gen, step, echo, out, frame, jobs):
    import boxwood_runtime
    from boxwood_runtime.scorer import SELF_CHECK_ULPS, ulp_distance
    from boxwood_runtime.stream import score_stream

    from .export import export
    from .sources.model import SourceModel

    # -- export -------------------------------------------------------------------
    step("Export each model to a boxwood artefact")
    paths = {}
    ensembles = {}
    for name, model, _, _ in jobs:
        path = out / (name + ".json")
        result = export(model, path)  # the library's export pipeline: read, write, check
        ensemble = ensembles[name] = result.ensemble
        size = result.bytes
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
        records = data.to_dict("records")  # NaN stays NaN: the scorer reads it as missing
        rows = [[None if (isinstance(v, float) and v != v) else v for v in (r[n] for n in device.input_names)]
                for r in records]
        # scikit-learn's own numbers on the same rows (decision_function, predict, the
        # forest's averaged output or the isolation forest's summed path lengths)
        theirs = SourceModel(model, ensembles[name]).raw(rows).ravel().tolist()
        raws = [device.raw_scores(device.prepare(r)) for r in rows]
        mine = [v for raw in raws for v in device.exact_values(raw)]
        worst = 0.0
        identical = len(mine) == len(theirs)
        for a, b in zip(mine, theirs):
            worst = max(worst, abs(a - b))
            identical = identical and _same_bits(a, b)
        all_ok = all_ok and identical
        echo("   %-28s max |difference| = %r over %d rows (bit-identical: %s)"
             % (name, worst, len(records), "yes" if identical else "NO"))
        if task in ("classification", "outlier_detection"):
            labels = model.predict(data).tolist()
            agree = sum(1 for raw, want in zip(raws, labels) if device.predict_from_raw(raw) == want)
            all_ok = all_ok and agree == len(labels)
            if task == "outlier_detection":
                echo("   %-28s labels agree on %d of %d rows" % ("", agree, len(labels)))
                continue
            proba = model.predict_proba(data).tolist()
            ulps = max(ulp_distance(a, b) for r, want in zip(records, proba)
                       for a, b in zip(device.predict_proba(r), want))
            within = ulps <= SELF_CHECK_ULPS
            all_ok = all_ok and within
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
    for name in [j[0] for j in jobs if j[0] in ("next_hour_temp_hgb", "defrost_needed_hgb",
                                                  "defrost_needed_pipeline")]:
        scored = out / ("sample_scored_%s.csv" % name)
        with open(csv_path, newline="", encoding="utf-8") as src, \
                open(scored, "w", newline="", encoding="utf-8") as dst:
            counts = score_stream(devices[name], src, dst, id_column="reading_id")
        echo("   %s -> %s: %d rows read, %d scored, %d with an error%s:"
             % (name, scored.name, counts.rows, counts.scored, counts.errors,
                " (its encoder maps an unknown room type to -1, as configured)" if name.endswith("pipeline") else ""))
        with open(scored, encoding="utf-8") as fh:
            for line in fh:
                echo("     " + line.rstrip("\n"))

    # -- where --------------------------------------------------------------------
    step("Files")
    for path in sorted(out.iterdir()):
        if path.is_file():
            echo("   %8d  %s" % (path.stat().st_size, path))
    first = paths[jobs[0][0]]
    echo("   try: boxwood inspect %s" % first)
    echo("        boxwood score %s %s --id-column reading_id" % (first, csv_path))
    echo("all device raw scores bit-identical to scikit-learn: %s" % ("yes" if all_ok else "NO"))
    return 0 if all_ok else 1
