"""Temperature scaling (Guo et al. 2017, "On Calibration of Modern Neural Networks"): the one scalar T > 0 that
minimises the NLL of softmax(logits / T) on the validation split. scipy's bounded 1-D search, on the training
side; the figures it is judged by are shrinkwrap.serve.calibration's."""
from __future__ import annotations

import numpy as np

from shrinkwrap.serve.calibration import T_BOUNDS, nll, softmax


def fit_temperature(logits, labels) -> float:
    """The T minimising the NLL of softmax(logits / T) (a bounded 1-D search over log T, scipy)."""
    from scipy.optimize import minimize_scalar

    logits, labels = np.asarray(logits, dtype=np.float64), np.asarray(labels)
    if len(labels) == 0:
        raise ValueError("no texts to fit a temperature on")
    res = minimize_scalar(lambda log_t: nll(softmax(logits, np.exp(log_t)), labels),
                          bounds=(np.log(T_BOUNDS[0]), np.log(T_BOUNDS[1])), method="bounded",
                          options={"xatol": 1e-4})
    return float(np.exp(res.x))
