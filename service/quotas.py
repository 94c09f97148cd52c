"""Per-tenant limits on what one tenant may ask of the shared job runner.

Past a limit that passes with time (queued analyses, bootstrap replicates in flight) the
answer is 429 with Retry-After; one analysis asking for more replicates than any analysis
may have is 422, since asking again cannot help. Running analyses per tenant are limited by
the runner itself (service/store.py, claim_next): they wait in the queue.
"""

from __future__ import annotations

from .config import ServiceConfig, setting_name
from .errors import ApiError
from .store import Store

RETRY_AFTER_SECONDS = 30  # a queued analysis usually starts or ends within this


def check_new_analysis(cfg: ServiceConfig, store: Store, tenant_id: str, replicates: int) -> None:
    """Raise the 429 or 422 ApiError when the tenant may not queue this analysis now."""
    if cfg.max_bootstrap and replicates > cfg.max_bootstrap:
        raise ApiError(422, "over_limit", (
            f"this service runs at most {cfg.max_bootstrap} bootstrap replicates per analysis "
            f"({setting_name('max_bootstrap')}); ask for fewer"), "options.bootstrap",
            {"limit": setting_name("max_bootstrap"), "limit_value": cfg.max_bootstrap})
    load = store.tenant_load(tenant_id)
    retry = {"Retry-After": str(RETRY_AFTER_SECONDS)}
    if load["queued"] >= cfg.tenant_max_queued:
        raise ApiError(429, "too_many_queued", (
            f"this tenant already has {load['queued']} analyses waiting, the most allowed "
            f"({setting_name('tenant_max_queued')} = {cfg.tenant_max_queued}); try again when "
            "some have started"), None,
            {"limit": setting_name("tenant_max_queued"), "limit_value": cfg.tenant_max_queued},
            headers=retry)
    budget = cfg.tenant_max_replicates
    if budget and replicates and load["replicates"] + replicates > budget:
        if replicates > budget:
            raise ApiError(422, "over_limit", (
                f"{replicates} bootstrap replicates are more than this tenant may have in "
                f"flight at all ({setting_name('tenant_max_replicates')} = {budget}); ask for "
                "fewer"), "options.bootstrap",
                {"limit": setting_name("tenant_max_replicates"), "limit_value": budget})
        raise ApiError(429, "too_many_replicates", (
            f"this tenant's queued and running analyses already ask for {load['replicates']} "
            f"bootstrap replicates; {replicates} more would pass the limit of {budget} "
            f"({setting_name('tenant_max_replicates')}); try again when some have finished"),
            "options.bootstrap",
            {"limit": setting_name("tenant_max_replicates"), "limit_value": budget},
            headers=retry)
