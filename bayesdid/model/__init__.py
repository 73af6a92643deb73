"""The model: shared hierarchical terms (:mod:`.terms`), one module per outcome family (:mod:`.gaussian`,
:mod:`.families` with :mod:`.binomial` and :mod:`.counts`), the structure rules read off the cells
(:mod:`.structure`), the numpy twins that replicate data (:mod:`.twins`) and the family registry
(:mod:`.registry`: ``build_model``, ``pointwise_loglik``, the priors each family has).

Nothing is imported here, so that reading a structure rule does not load PyMC.
"""
