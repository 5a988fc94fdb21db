"""Cohort-scale work on the researcher's side.

``source``   where opened bundles come from: the study folder or the server's database
``merge``    streaming cohort tables (CSV, constant memory) with a data dictionary
``analyse``  per-participant comparisons and the group difference, on Dask
``plan``     study planning: power by simulation, on Dask
``plots``    cohort distributions that stay readable at 1,000 participants
"""
