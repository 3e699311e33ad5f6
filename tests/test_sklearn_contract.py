"""DependencyTree against scikit-learn's estimator conventions.

DependencyTree takes tables, not numeric arrays, and is not a subclass of sklearn's BaseEstimator,
so only some of ``sklearn.utils.estimator_checks`` apply. The parameter checks run on it as it is.
The checks of fit's behaviour feed numeric arrays; they run on ``ArrayInput``, a subclass that only
turns an array into a pyarrow Table (columns x0, x1, ...) and declares minimal tags. Every other
check is listed in ``NOT_APPLICABLE`` with the reason it cannot apply.
"""

from __future__ import annotations

import copy
import inspect
import pickle
import warnings
from collections.abc import Callable
from typing import Any

import numpy as np
import pandas as pd
import pyarrow as pa
import pytest
import sklearn
import treewise
from sklearn.base import clone
from sklearn.utils import estimator_checks
from treewise import DependencyTree

PARAMS = {
    "columns": None,
    "max_categories": 128,
    "n_bins": 10,
    "kinds": None,
    "root": None,
    "alpha": 0.5,
    "prune": None,
    "memory_limit": None,
    "epsilon": None,
    "delta": None,
    "domains": None,
    "privacy_split": None,
    "random_state": None,
}


def table(n: int = 300, seed: int = 0) -> pa.Table:
    rng = np.random.default_rng(seed)
    a = rng.integers(0, 4, n)
    b = np.where(rng.random(n) < 0.8, a % 3, rng.integers(0, 3, n))
    return pa.table(
        {
            "a": a,
            "b": [f"v{k}" for k in b],
            "f": a + rng.random(n),
        }
    )


# -- the parameter protocol ---------------------------------------------------------------------


def test_get_params_lists_the_constructor_parameters_and_defaults() -> None:
    signature = inspect.signature(DependencyTree.__init__)
    defaults = {k: p.default for k, p in signature.parameters.items() if k != "self"}
    assert defaults == PARAMS
    assert DependencyTree().get_params() == PARAMS
    assert DependencyTree().get_params(deep=False) == PARAMS
    model = DependencyTree(columns=["a", "b"], alpha=2.0, root="b")
    assert model.get_params() == {**PARAMS, "columns": ["a", "b"], "alpha": 2.0, "root": "b"}


def test_set_params_sets_and_returns_self() -> None:
    model = DependencyTree()
    assert model.set_params(n_bins=4, max_categories=9) is model
    assert model.get_params() == {**PARAMS, "n_bins": 4, "max_categories": 9}
    assert model.set_params() is model
    with pytest.raises(ValueError, match="'beta'"):
        model.set_params(beta=1)
    assert model.get_params() == {**PARAMS, "n_bins": 4, "max_categories": 9}


def test_set_params_takes_effect_on_the_next_fit() -> None:
    model = DependencyTree().fit(table())
    assert len(model.categories_[2]) == 10  # ten float bins
    model.set_params(n_bins=3, columns=["f", "a"]).fit(table())
    assert list(model.feature_names_in_) == ["f", "a"]
    assert len(model.categories_[0]) == 3


def test_clone_of_a_fitted_model_is_unfitted_with_the_same_params() -> None:
    model = DependencyTree(columns=["a", "b"], n_bins=3, alpha=0.1, root="b").fit(table())
    copy_ = clone(model)
    assert type(copy_) is DependencyTree
    assert copy_.get_params() == model.get_params()
    assert copy_.columns is not model.columns  # parameters are copied, not shared
    assert not hasattr(copy_, "feature_names_in_")
    with pytest.raises(treewise.NotFittedError):
        copy_.score_samples(table())
    assert not [k for k in vars(copy_) if k.endswith("_")]
    copy_.fit(table())
    np.testing.assert_array_equal(copy_.score_samples(table()), model.score_samples(table()))


def test_repr_shows_only_non_defaults() -> None:
    assert repr(DependencyTree()) == "DependencyTree()"
    assert repr(DependencyTree(alpha=0.5)) == "DependencyTree()"
    assert repr(DependencyTree(alpha=0.0, root="b")) == "DependencyTree(root='b', alpha=0.0)"
    assert (
        repr(DependencyTree(columns=["a"], max_categories=5, n_bins=3))
        == "DependencyTree(columns=['a'], max_categories=5, n_bins=3)"
    )
    assert repr(DependencyTree().fit(table())) == "DependencyTree()"


@pytest.mark.parametrize("kind", ["ndarray", "pandas Index"])
def test_repr_with_array_like_columns(kind: str) -> None:
    names = ["a", "b"]
    columns = np.array(names) if kind == "ndarray" else pd.Index(names)
    model = DependencyTree(columns=columns).fit(table())
    assert list(model.feature_names_in_) == names  # fit takes them
    assert repr(model).startswith("DependencyTree(columns=")


def test_init_only_stores_parameters() -> None:
    model = DependencyTree(columns=["a"], max_categories=1, n_bins=-3, root="zz", alpha=-1)
    # Validation happens in fit (scikit-learn convention), not in __init__ or set_params.
    assert vars(model) == {
        "columns": ["a"],
        "max_categories": 1,
        "n_bins": -3,
        "kinds": None,
        "root": "zz",
        "alpha": -1,
        "prune": None,
        "memory_limit": None,
        "epsilon": None,
        "delta": None,
        "domains": None,
        "privacy_split": None,
        "random_state": None,
    }
    with pytest.raises(ValueError, match="max_categories"):
        model.fit(table())


def test_fit_returns_self_and_fitted_attributes_end_in_underscore() -> None:
    model = DependencyTree()
    before = set(vars(model))
    assert model.fit(table(), None) is model
    added = set(vars(model)) - before
    public = {k for k in added if not k.startswith("_")}
    assert public == {
        "feature_names_in_",
        "n_features_in_",
        "n_rows_",
        "codebook_",
        "categories_",
        "kinds_",
        "parent_",
        "mutual_info_",
        "pairwise_mutual_info_",
        "n_parameters_",
        "privacy_",
    }
    assert all(k.endswith("_") for k in public)
    assert model.get_params() == PARAMS  # fitting changes no parameter


def test_refit_replaces_every_fitted_attribute() -> None:
    model = DependencyTree().fit(table())
    model.fit(pa.table({"q": [True, False, True], "r": [1, 1, 2]}))
    assert list(model.feature_names_in_) == ["q", "r"]
    assert model.n_features_in_ == 2 and model.n_rows_ == 3
    assert model.pairwise_mutual_info_.shape == (2, 2)
    # Every pair is available, but only of the new data.
    assert model.joint_counts("q", "r").sum() == 3
    with pytest.raises(KeyError):
        model.joint_counts("a", "b")


UNFITTED_CALLS: dict[str, Callable[[DependencyTree], Any]] = {
    "score_samples": lambda m: m.score_samples(table()),
    "score": lambda m: m.score(table()),
    "bic": lambda m: m.bic(table()),
    "aic": lambda m: m.aic(table()),
    "sample": lambda m: m.sample(3),
    "iter_sample": lambda m: next(m.iter_sample(3)),
    "edges": lambda m: m.edges(),
    "marginal_counts": lambda m: m.marginal_counts("a"),
    "joint_counts": lambda m: m.joint_counts("a", "b"),
}


@pytest.mark.parametrize("method", sorted(UNFITTED_CALLS))
def test_methods_before_fit_raise_not_fitted_error(method: str) -> None:
    with pytest.raises(treewise.NotFittedError, match="not fitted") as caught:
        UNFITTED_CALLS[method](DependencyTree())
    # sklearn's own NotFittedError derives from ValueError and AttributeError, so does ours.
    assert isinstance(caught.value, ValueError) and isinstance(caught.value, AttributeError)


def test_surprisal_before_fit_raises_not_fitted_error() -> None:
    with pytest.raises(treewise.NotFittedError, match="not fitted"):
        DependencyTree().surprisal(table())


@pytest.mark.parametrize("how", ["pickle", "deepcopy"])
def test_fitted_model_survives_pickle_and_deepcopy(how: str) -> None:
    model = DependencyTree().fit(table())
    if how == "pickle":
        again = pickle.loads(pickle.dumps(model))
    else:
        again = copy.deepcopy(model)
    np.testing.assert_array_equal(again.score_samples(table()), model.score_samples(table()))


def test_unfitted_model_survives_pickle_and_deepcopy() -> None:
    model = DependencyTree(alpha=0.2, columns=["a"])
    assert pickle.loads(pickle.dumps(model)).get_params() == model.get_params()
    assert copy.deepcopy(model).get_params() == model.get_params()


# -- scikit-learn's own checks ------------------------------------------------------------------

#: Checks that run on DependencyTree itself (they need no data).
DIRECT_CHECKS = [
    "check_get_params_invariance",
    "check_set_params",
    "check_no_attributes_set_in_init",
    "check_parameters_default_constructible",
    "check_estimator_cloneable",
    "check_estimator_repr",
    "check_do_not_raise_errors_in_init_or_set_params",
]


@pytest.mark.parametrize("check", DIRECT_CHECKS)
def test_sklearn_parameter_checks(check: str) -> None:
    # outside check: sklearn.utils.estimator_checks
    getattr(estimator_checks, check)("DependencyTree", DependencyTree())


class ArrayInput(DependencyTree):
    """DependencyTree fed numeric arrays as tables of columns x0, x1, ...; nothing else changes."""

    def __sklearn_tags__(self) -> Any:
        return sklearn.utils.Tags(
            estimator_type=None,
            target_tags=sklearn.utils.TargetTags(required=False),
            transformer_tags=None,
            regressor_tags=None,
            classifier_tags=None,
        )

    @staticmethod
    def _as_table(data: Any) -> Any:
        if isinstance(data, np.ndarray) and data.ndim == 2:
            return pa.table(
                {f"x{k}": np.ascontiguousarray(data[:, k]) for k in range(data.shape[1])}
            )
        return data

    def fit(self, data: Any, y: None = None) -> ArrayInput:
        super().fit(self._as_table(data), y)
        return self

    def score_samples(self, data: Any) -> Any:
        return super().score_samples(self._as_table(data))

    # predict and predict_proba answer questions about one column (they take a target), so they
    # are not scikit-learn's predict(X): hide them from the array checks.
    @property
    def predict(self) -> Any:
        raise AttributeError("predict takes a target column; not part of the array checks")

    @property
    def predict_proba(self) -> Any:
        raise AttributeError("predict_proba takes a target column; not part of the array checks")

    def partial_fit(self, data: Any, y: None = None) -> ArrayInput:
        super().partial_fit(self._as_table(data), y)
        return self


#: Checks of fit's behaviour that run through ArrayInput.
FIT_CHECKS = [
    "check_dont_overwrite_parameters",
    "check_estimators_overwrite_params",
    "check_estimators_fit_returns_self",
    "check_fit_idempotent",
    "check_fit_check_is_fitted",
    "check_n_features_in",
    "check_dict_unchanged",
    "check_fit_score_takes_y",
    "check_requires_y_none",
    "check_methods_sample_order_invariance",
    "check_methods_subset_invariance",
    "check_estimators_dtypes",
    "check_fit2d_1sample",
    "check_fit2d_1feature",
    "check_readonly_memmap_input",
    "check_pipeline_consistency",
    "check_estimators_pickle",
    "check_f_contiguous_array_estimator",
    "check_inplace_ensure_writeable",
    "check_positive_only_tag_during_fit",
]


@pytest.mark.parametrize("check", FIT_CHECKS)
def test_sklearn_fit_checks_through_array_input(check: str) -> None:
    # outside check: sklearn.utils.estimator_checks
    getattr(estimator_checks, check)("ArrayInput", ArrayInput())


#: The checks that do not apply, with the reason.
NOT_APPLICABLE = {
    "check_n_features_in_after_fitting": "scoring picks the fitted columns by name and ignores "
    "extra columns by design, so a different column count is not an error",
    "check_dataframe_column_names_consistency": "columns are matched by name in any order by "
    "design, so reordered names are not an error",
    "check_estimators_nan_inf": "NaN in a float column is the null category by design "
    "(infinity is refused, see test_fit_errors.py)",
    "check_estimators_empty_data_messages": "the empty-data error is a ValueError "
    "(treewise.DataError) but words its message its own way, not with sklearn's pattern",
    "check_fit1d": "a table has no one-dimensional form",
    "check_estimators_unfitted": "vacuous: it calls only predict, predict_proba, "
    "decision_function and predict_log_proba, none of which a DependencyTree has; "
    "test_methods_before_fit_raise_not_fitted_error covers the methods it does have",
    "check_is_fitted": "not a check but sklearn.utils.validation.check_is_fitted; it needs "
    "__sklearn_tags__, and check_fit_check_is_fitted runs it through ArrayInput",
    "check_valid_tag_types": "DependencyTree is not a BaseEstimator and declares no tags",
    "check_estimator_tags_renamed": "vacuous: DependencyTree defines no tags at all",
    "check_mixin_order": "vacuous: DependencyTree uses no scikit-learn mixins",
    "check_param_validation": "needs sklearn's private _parameter_constraints",
    "check_get_feature_names_out_error": "not a transformer: no get_feature_names_out",
    "check_nonsquare_error": "only for pairwise (kernel or distance matrix) estimators",
    "check_complex_data": "complex numbers are not a column type of a table",
    "check_fit_non_negative": "only for estimators that require non-negative input",
    "check_fit2d_predict1d": "no predict, transform or decision_function to call",
    "check_dtype_object": "its object arrays hold a dict to provoke sklearn's own TypeError "
    "wording; turning such an array into a table fails in pyarrow, before treewise sees it",
    "check_sparsify_coefficients": "only for linear models with coef_",
}

#: Explained checks that pass through ArrayInput because they only call methods it lacks
#: (predict, transform, get_feature_names_out, ...) or only look at tags and mixins.
VACUOUS = {
    "check_estimators_unfitted",
    "check_fit2d_predict1d",
    "check_valid_tag_types",
    "check_estimator_tags_renamed",
    "check_mixin_order",
}


@pytest.mark.parametrize("check", sorted(set(NOT_APPLICABLE) - VACUOUS))
def test_checks_explained_away_do_fail(check: str) -> None:
    # An explanation is owed only by a check that does not pass: one that passes belongs in
    # FIT_CHECKS (outside check: sklearn.utils.estimator_checks).
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        with pytest.raises(Exception):  # noqa: B017 - any failure of the check will do
            getattr(estimator_checks, check)("ArrayInput", ArrayInput())


#: Families of checks for other kinds of estimator (prefix -> kind).
OTHER_KINDS = {
    "check_classifier": "classifiers",
    "check_class_weight": "classifiers",
    "check_decision_proba": "classifiers",
    "check_regressor": "regressors",
    "check_supervised": "supervised estimators",
    "check_transformer": "transformers",
    "check_set_output": "transformers",
    "check_global_": "transformers (set_output)",
    "check_clust": "clusterers",
    "check_outlier": "outlier detectors",
    "check_sample_weight": "estimators that take sample_weight",
    "check_all_zero_sample_weights": "estimators that take sample_weight",
    "check_estimator_sparse": "sparse-matrix input",
    "check_array_api": "array-API input",
    "check_estimators_partial_fit": "estimators with partial_fit",
    "check_non_transformer_estimators_n_iter": "iterative estimators (n_iter_)",
    "check_estimators_data_not_an_array": "numeric array-likes for supervised estimators",
}


def test_every_sklearn_check_is_run_or_explained() -> None:
    available = {n for n in dir(estimator_checks) if n.startswith("check_")}
    available.discard("check_estimator")  # runs every check: not one check
    listed = set(DIRECT_CHECKS) | set(FIT_CHECKS) | set(NOT_APPLICABLE)
    assert listed <= available, listed - available  # no stale names
    assert VACUOUS <= set(NOT_APPLICABLE)
    assert not set(FIT_CHECKS) & set(NOT_APPLICABLE)
    unexplained = {n for n in available - listed if not any(n.startswith(p) for p in OTHER_KINDS)}
    assert unexplained == set()
