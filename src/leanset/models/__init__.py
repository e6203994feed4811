"""The models: the cheap proxies whose training dynamics are scored, and the target model that is verified."""

from .proxy import BatchSequence, FittedProxy, fit_proxy

__all__ = ["BatchSequence", "FittedProxy", "fit_proxy"]
