"""Loaders for model files: BIF, XMLBIF and UAI through pgmpy's readers, plus the networks
bundled inside the pgmpy wheel, read offline. See :mod:`model_zoo.networks.readers`."""

from model_zoo.networks.pgmpy_bridge import from_pgmpy, to_pgmpy
from model_zoo.networks.readers import (
    NORMALISATION_TOLERANCE,
    bundled_networks,
    bundled_path,
    read_network,
    write_network,
)

__all__ = ["NORMALISATION_TOLERANCE", "bundled_networks", "bundled_path", "read_network",
           "write_network", "from_pgmpy", "to_pgmpy"]
