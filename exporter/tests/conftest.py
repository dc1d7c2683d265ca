import os
import sys
from pathlib import Path

os.environ.setdefault("OMP_NUM_THREADS", "1")
sys.path.insert(0, str(Path(__file__).resolve().parent))

import numpy as np  # noqa: E402
import pytest  # noqa: E402
from sklearn.datasets import load_breast_cancer  # noqa: E402


@pytest.fixture(scope="session")
def cancer():
    """scikit-learn `load_breast_cancer` (Street, Wolberg and Mangasarian 1993): 12 features, malignant = 1,
    every 5th value of feature 0 missing, feature 2 cut into 4 integer codes; split 3:1."""
    data = load_breast_cancer()
    x = data.data[:, :12].copy()
    y = (data.target == 0).astype(int)
    x_nan = x.copy()
    x_nan[::5, 0] = np.nan
    x_cat = x_nan.copy()
    x_cat[:, 2] = np.searchsorted(np.quantile(x[:, 2], [0.25, 0.5, 0.75]), x[:, 2], side="right")
    rows = np.arange(len(y))
    tr, te = rows[rows % 4 != 0], rows[rows % 4 == 0]
    names = [str(n).replace(" ", "_") for n in data.feature_names[:12]]
    return {"x": x, "x_nan": x_nan, "x_cat": x_cat, "y": y, "tr": tr, "te": te, "names": names}
