"""Closed-loop campaigns: ``evaluators`` run one run, ``engines`` say where (pools, Dask), ``loop`` runs it.
"""

from windowfinder.campaign.loop import (CampaignResult, CampaignStopped, RunLedger, admissible,  # noqa: F401
                                        run_campaign, run_seed)

__all__ = ["CampaignResult", "CampaignStopped", "RunLedger", "admissible", "run_campaign", "run_seed"]
