"""Consortium planning: analytic sample sizes for the precision a study wants.

One module per published criterion: :mod:`.auc_precision` (Hanley & McNeil 1982;
Obuchowski 1997 for several observations per patient), :mod:`.accuracy_precision`
(Buderer 1996) and :mod:`.external_validation` (Riley et al. 2021). Each returns a
:class:`~coordinator.planning.sample_size.SampleSize`. The simulation-based grid over
sites and cases per site lives in :mod:`simulations.planning`.
"""
