"""Real tables for the tests and benchmarks: statsmodels' bundled datasets, scored out of fold.

``randhie``: the RAND Health Insurance Experiment sample (20,190 people), target "any
outpatient visit" (``mdvis > 0``). ``fair``: Fair's 1978 survey of extramarital affairs
(6,366 women), target "any affair" (``affairs > 0``). Both ship with statsmodels (no
download). The model is scikit-learn's HistGradientBoostingClassifier and its predictions
are out of fold (5-fold ``cross_val_predict``), as a practitioner would score a dev set.
"""
import pandas as pd

#: dataset -> the count column whose "> 0" is the target
TARGETS = {"randhie": "mdvis", "fair": "affairs"}


def scored(name: str) -> tuple[pd.DataFrame, str]:
    """(frame with the features, ``<target>_any`` and ``predicted``, the label column)."""
    import statsmodels.api as sm
    from sklearn.ensemble import HistGradientBoostingClassifier
    from sklearn.model_selection import cross_val_predict

    target = TARGETS[name]
    data = getattr(sm.datasets, name).load_pandas().data
    label = f"{target}_any"
    y = (data[target] > 0).astype(int)
    x = data.drop(columns=[target])
    pred = cross_val_predict(HistGradientBoostingClassifier(random_state=0), x, y, cv=5)
    return x.assign(**{label: y.to_numpy(), "predicted": pred}), label
