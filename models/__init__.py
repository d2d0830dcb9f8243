"""Physics of the switching stages: devices, loads, stage topologies, part library.

Importing the package registers every stage with :func:`tolerance.protocol.register_stage`.
"""

from tolerance.models.stages import single  # noqa: F401  (registers "single")
from tolerance.models.stages import darlington  # noqa: F401,E402  (registers "darlington")
from tolerance.models.stages import sziklai  # noqa: F401,E402  (registers "sziklai")
