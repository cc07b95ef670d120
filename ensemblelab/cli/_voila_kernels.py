"""A kernel manager for the explorer's Voila server that caps concurrent kernels.

Imported by the Voila process only (named in its configuration by
``ensemblelab explore``), never by ``import ensemblelab``.
"""

from __future__ import annotations

from typing import Any

from jupyter_server.services.kernels.kernelmanager import AsyncMappingKernelManager
from tornado.web import HTTPError
from traitlets import Int

__all__ = ["CappedKernelManager"]


class CappedKernelManager(AsyncMappingKernelManager):
    """Refuse a new kernel (HTTP 503) while `max_kernels` kernels are running.

    Each explorer page holds one kernel (a few hundred MB); idle kernels and those
    of closed pages are culled (``cull_idle_timeout``), which frees a place.
    """

    max_kernels = Int(4, config=True, help="most kernels (explorer pages) at once")

    # async at runtime in AsyncMappingKernelManager; the typed base declares it sync
    async def start_kernel(self, *args: Any, **kwargs: Any) -> str:  # type: ignore[override]
        """Start a kernel unless the cap is reached."""
        if len(self.list_kernel_ids()) >= self.max_kernels:
            raise HTTPError(503, f"ensemblelab explore: {self.max_kernels} explorer page(s) "
                                 "are open already; close one (or wait until an idle one is "
                                 "culled) and reload.")
        return await super().start_kernel(*args, **kwargs)
