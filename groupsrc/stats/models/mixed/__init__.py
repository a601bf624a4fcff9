"""The mass-univariate linear mixed model: the equation and its decomposition
(:mod:`.model`), the vectorized REML fit (:mod:`.fit`), per-feature inference
(:mod:`.inference`), the statistic kernel (:mod:`.kernel`) and small linear algebra
over a trailing feature axis (:mod:`.linalg`)."""
