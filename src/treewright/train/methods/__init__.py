"""Update methods: each owns its statistics or optimizer, its update and its checkpoint
tensors (`base.UpdateMethod`). `METHODS` maps the config's `train.method` names to them; a new
method is one module here and one line below."""

from treewright.train.methods.base import Step, Update, UpdateMethod
from treewright.train.methods.em import EM, MapEM
from treewright.train.methods.gradient import Gradient
from treewright.train.methods.online import OnlineEM
from treewright.train.methods.vb import VB

METHODS: dict[str, type[UpdateMethod]] = {
    "em": EM, "map_em": MapEM, "vb": VB, "online_em": OnlineEM, "gradient": Gradient}

__all__ = ["METHODS", "Step", "Update", "UpdateMethod"]
