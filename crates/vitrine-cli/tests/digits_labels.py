"""Public labelled images and scikit-learn's figures for tests/digits_labels.rs.

Two commands, both run by the Rust test with the interpreter in VITRINE_PYTHON (packages pinned
in tools/requirements-test.txt):

    python digits_labels.py write FOLDER TRUTH
        Writes into FOLDER a small image collection from scikit-learn's bundled handwritten digits
        (sklearn.datasets.load_digits: 1,797 8x8 greyscale images of the digits 0-9, shipped
        inside the scikit-learn wheel, nothing downloaded) and, as JSON in TRUTH, the true digit
        of every planted mislabel and every unlabelled image.

    python digits_labels.py reference EMBEDDINGS TRUTH
        Reads the embeddings vitrine stored for that collection and prints, as JSON on stdout,
        what scikit-learn's LogisticRegression makes of them: out-of-fold probabilities from
        cross_val_predict for the suspects, a model fitted on every labelled image for the
        unlabelled ones.

The collection (layout read by vitrine's folder convention, train/<label>/<file>):

- train/<d>/: 20 images of each digit d, labelled correctly;
- train/<d>/ again: 8 planted mislabels, images of one digit filed under another digit's
  folder, four within digits 0-4 and four within digits 5-9 (so that each half of the classes
  can be scored on its own);
- unsorted/: 30 unlabelled images, 3 of each digit, none of them also in train/.

Every image is a distinct 8x8 picture (identical pictures are skipped), drawn dark on white
(ink 16 -> black), enlarged to 64x64 by nearest neighbour and saved as 8-bit greyscale PNG.
The choice depends only on SEED and the bundled data.
"""

import json
import math
import sys
from pathlib import Path

import numpy as np
import sklearn
from PIL import Image
from sklearn.datasets import load_digits
from sklearn.linear_model import LogisticRegression
from sklearn.pipeline import make_pipeline
from sklearn.preprocessing import StandardScaler
from sklearn.model_selection import StratifiedKFold, cross_val_predict

SEED = 20260214
TRAIN_PER_DIGIT = 20
UNLABELLED_PER_DIGIT = 3
# Planted mislabels per half of the digits (0-4, 5-9).
PLANTED_PER_HALF = 4
HALVES = [list(range(0, 5)), list(range(5, 10))]
SIDE = 64


def save_digit(pixels, path):
    # load_digits stores ink as 0 (none) to 16 (full).
    grey = np.round(255.0 - pixels * (255.0 / 16.0)).astype(np.uint8)
    path.parent.mkdir(parents=True, exist_ok=True)
    Image.fromarray(grey).resize((SIDE, SIDE), Image.Resampling.NEAREST).save(path)


def write(folder, truth_path):
    folder = Path(folder)
    digits = load_digits()
    rng = np.random.default_rng(SEED)
    # Per digit, its images in a seeded order, skipping pictures already taken.
    seen = set()
    queues = {}
    for digit in range(10):
        order = rng.permutation(np.flatnonzero(digits.target == digit))
        queue = []
        for index in order:
            key = digits.images[index].tobytes()
            if key not in seen:
                seen.add(key)
                queue.append(int(index))
        queues[digit] = queue

    def take(digit):
        return queues[digit].pop(0)

    def name(index):
        return f"digits_{index:04d}.png"

    files = []
    for digit in range(10):
        for _ in range(TRAIN_PER_DIGIT):
            index = take(digit)
            files.append((f"train/{digit}/{name(index)}", index))
    unlabelled = {}
    for digit in range(10):
        for _ in range(UNLABELLED_PER_DIGIT):
            index = take(digit)
            path = f"unsorted/{name(index)}"
            files.append((path, index))
            unlabelled[path] = str(digit)
    planted = []
    for half in HALVES:
        # Every digit of the half once, then one more; each filed under another digit of
        # the same half.
        true_digits = list(rng.permutation(half)) + [int(rng.choice(half))]
        for true_digit in true_digits[:PLANTED_PER_HALF]:
            others = [d for d in half if d != true_digit]
            carried = int(rng.choice(others))
            index = take(int(true_digit))
            path = f"train/{carried}/{name(index)}"
            files.append((path, index))
            planted.append(
                {"path": path, "true_label": str(int(true_digit)), "carried_label": str(carried)}
            )
    paths = [path for path, _ in files]
    assert len(set(paths)) == len(paths), "two images under one path"
    for path, index in files:
        save_digit(digits.images[index], folder / path)
    truth = {
        "source": "sklearn.datasets.load_digits",
        "scikit_learn_version": sklearn.__version__,
        "seed": SEED,
        "images": len(files),
        "halves": [[str(d) for d in half] for half in HALVES],
        "planted": planted,
        "unlabelled": unlabelled,
    }
    Path(truth_path).write_text(json.dumps(truth, indent=1) + "\n")


def reference(embeddings_path, truth_path):
    images = json.loads(Path(embeddings_path).read_text())["images"]
    truth = json.loads(Path(truth_path).read_text())
    labelled = [image for image in images if image["label"] is not None]
    unlabelled = [image for image in images if image["label"] is None]
    x = np.array([image["embedding"] for image in labelled], dtype=np.float64)
    y = np.array([image["label"] for image in labelled])
    # The same model as vitrine's: standardised features (mean and population standard
    # deviation of the labelled images), then scikit-learn's defaults but for max_iter, raised
    # to the cap vitrine's own fit uses (1000) so that neither side stops short of the optimum.
    model = make_pipeline(StandardScaler(), LogisticRegression(C=1.0, max_iter=1000))
    folds = StratifiedKFold(n_splits=5, shuffle=True, random_state=0)
    out_of_fold = cross_val_predict(model, x, y, cv=folds, method="predict_proba")
    classes = list(np.unique(y))  # the column order of predict_proba
    own = np.array([classes.index(label) for label in y])
    disagreement = 1.0 - out_of_fold[np.arange(len(y)), own]
    ranked = sorted(
        zip(disagreement.tolist(), [image["path"] for image in labelled]),
        key=lambda pair: (-pair[0], pair[1]),
    )

    fitted = model.fit(x, y)
    assert list(fitted.classes_) == classes
    z = np.array([image["embedding"] for image in unlabelled], dtype=np.float64)
    probabilities = fitted.predict_proba(z)
    predictions = sorted(
        (
            {
                "path": image["path"],
                "label": classes[int(row.argmax())],
                "probability": float(row.max()),
            }
            for image, row in zip(unlabelled, probabilities)
        ),
        key=lambda p: (-p["probability"], p["path"]),
    )

    # Whole-collection figures computed here, independently of the Rust side's scoring.
    planted = {p["path"] for p in truth["planted"]}
    top = 2 * len(planted)
    figures = {"suspects_hits_at_twice_planted": sum(path in planted for _, path in ranked[:top])}
    for name, coverage in [("accuracy_at_coverage_0_5", 0.5), ("accuracy_at_coverage_1", 1.0)]:
        kept = predictions[: math.ceil(coverage * len(predictions))]
        right = sum(p["label"] == truth["unlabelled"][p["path"]] for p in kept)
        figures[name] = right / len(kept)
    report = {
        "scikit_learn_version": sklearn.__version__,
        "suspects": [{"path": path, "disagreement": d} for d, path in ranked],
        "predictions": predictions,
        "figures": figures,
    }
    json.dump(report, sys.stdout)
    print()


if __name__ == "__main__":
    if len(sys.argv) == 4 and sys.argv[1] == "write":
        write(sys.argv[2], sys.argv[3])
    elif len(sys.argv) == 4 and sys.argv[1] == "reference":
        reference(sys.argv[2], sys.argv[3])
    else:
        sys.exit(__doc__)
