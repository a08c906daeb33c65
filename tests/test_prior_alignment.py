"""A prior built from studies recorded over a different space (a parameter
renamed away, one added, bounds narrowed, a choice level dropped) is still a
valid prior, and its provenance says what alignment dropped, clipped or missed.
Real DuckDB archive in tmp_path; tasks are bootstrap resamples of scikit-learn's
bundled iris data."""

import numpy as np
import pandas as pd
from sklearn.datasets import load_iris

from warmstart.archive import Archive
from warmstart.profile import profile
from warmstart.space import Space

OLD = Space.from_dict({"params": {
    "C": {"type": "real", "low": 1e-3, "high": 1e3, "log": True},
    "kernel": {"type": "choice", "choices": ["rbf", "poly", "sigmoid"]},
    "shrinking_level": {"type": "integer", "low": 1, "high": 5},  # renamed away in the new space
}})
NEW = Space.from_dict({"params": {
    "C": {"type": "real", "low": 1e-2, "high": 1e2, "log": True},  # narrowed
    "kernel": {"type": "choice", "choices": ["rbf", "poly"]},  # "sigmoid" dropped
    "gamma": {"type": "real", "low": 1e-4, "high": 1.0, "log": True},  # added
    "degree": {"type": "integer", "low": 2, "high": 4, "when": {"kernel": ["poly"]}},
}})


def test_prior_over_a_changed_space_is_valid_and_reports_what_was_dropped(tmp_path):
    iris = load_iris(as_frame=True).frame
    rng = np.random.default_rng(0)
    with Archive(str(tmp_path / "a.duckdb")) as archive:
        for i in range(4):
            frame = iris.sample(frac=1.0, replace=True, random_state=i).reset_index(drop=True)
            task = archive.add_task(f"iris resample {i}", frame, "target")
            study = archive.add_study(task, "svm", OLD, metric="score")  # an invented score, not an accuracy
            configs = OLD.sample(40, rng)
            trials = pd.DataFrame(configs)
            trials["score"] = [-abs(np.log10(c["C"]) - 1.5) + (0.3 if c["kernel"] == "sigmoid" else 0) for c in configs]
            archive.add_trials(study, trials)
        prior = archive.build_prior(profile(iris, target="target"), learner="svm", space=NEW)
    for config in prior.sample(200, 1):
        NEW.validate(config)  # bounds, choices and conditions of the new space hold
    for config in prior.seeds:
        NEW.validate(config)
    neighbors = prior.provenance["neighbors"]
    assert len(neighbors) == 4
    for n in neighbors:
        assert "shrinking_level" in n["dropped"]  # renamed away
        assert "kernel" in n["dropped"]  # the sigmoid level is gone
        assert "C" in n["clipped"]  # bounds narrowed
        assert "gamma" in n["missing"]  # added parameter: left uniform
    # the past optimum (C = 10**1.5 = 31.6) was carried over inside the narrowed bounds
    lp = prior.logpdf([{"C": 31.6, "kernel": "rbf", "gamma": 0.01}, {"C": 0.012, "kernel": "rbf", "gamma": 0.01}])
    assert lp[0] > lp[1]
