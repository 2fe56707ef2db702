"""Mathematics of Tallywave: pure, vectorised numpy/scipy/statsmodels code.

Nothing in this package touches a database, a file or Prefect.  Each model is a
small class with keyword parameters in ``__init__``, ``fit(...)`` returning
``self`` and fitted state in attributes ending in ``_``.
"""
