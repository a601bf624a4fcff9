"""The models fitted at every feature: within-participant reduction (:mod:`.reduction`),
the GLM (:mod:`.glm`, its kernel :mod:`.ols`) and the mixed model (:mod:`.mixed`), each
kernel honouring the contract of :mod:`.base`."""
