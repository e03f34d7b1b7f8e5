"""Closed-loop campaigns: ``evaluators`` run one run (``commands``: an external program), ``engines`` say
where (pools, Dask), ``ledger`` keeps runs.csv, ``loop`` runs it, ``progress`` gives its figures after
each batch.
"""

from windowfinder.campaign.ledger import RunLedger, admissible  # noqa: F401
from windowfinder.campaign.loop import (CampaignResult, CampaignStopped,  # noqa: F401
                                        run_campaign, run_seed)

__all__ = ["CampaignResult", "CampaignStopped", "RunLedger", "admissible", "run_campaign", "run_seed"]
