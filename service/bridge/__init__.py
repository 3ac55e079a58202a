"""The historian bridge: plant sources -> local spool -> the service, and write-back.

See :mod:`service.bridge.runner` for how it runs, :mod:`service.bridge.config`
for the bridge file, and :mod:`service.bridge.sources` for the interface a site
implements to add a source of its own.
"""

from service.bridge.config import BridgeConfig, load_bridge_config
from service.bridge.runner import Bridge, BridgeSetupError, run_bridge
from service.bridge.sources import Source, SourceReading

__all__ = [
    "Bridge",
    "BridgeConfig",
    "BridgeSetupError",
    "Source",
    "SourceReading",
    "load_bridge_config",
    "run_bridge",
]
