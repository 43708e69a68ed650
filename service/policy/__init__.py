"""Site policy: every threshold the rules use, loaded from one TOML file and validated.

Decision support only: the thresholds are site policy, to be signed off by the deploying hospital;
defer to local protocols and licensed clinicians.
"""

from __future__ import annotations

from service.policy.load import PolicyError, load_policy
from service.policy.model import Policy, policy_hash

__all__ = ["Policy", "PolicyError", "load_policy", "policy_hash"]
