"""The fitted models: the URL model and the page model on one calibrated linear core.

Public: ``UrlModel`` (``url_model``), ``PageModel`` (``page_model``), their base
``CalibratedLinearClassifier`` and the ``Explanation`` they return. The other modules here
(hashing, linear, softmax, calibration, folds, params, text_features) are internal: their
names may change between releases.
"""

__all__: list[str] = []
