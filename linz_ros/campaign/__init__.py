"""Robustness campaigns: many closed-loop runs over the envelope, parameter ranges, noise, delay and references.

``spec`` reads the campaign section and draws the cases (scrambled Sobol); ``measures`` and
``report`` judge the whole (success rate with its interval, worst cases, sensitivity, region of
attraction) and write text, JSON, CSV and HTML, ``plots`` its figures. Running a case and its
rerun command are :mod:`linz_ros.commands.campaign`'s; the runs go through
:mod:`linz_ros.executor` (local processes or a Dask cluster).
"""

from linz_ros.campaign.spec import CAMPAIGN_KEY, Case, CaseResult, CampaignOutcome, CampaignSpec, Factor

__all__ = ["CAMPAIGN_KEY", "Case", "CaseResult", "CampaignOutcome", "CampaignSpec", "Factor"]
