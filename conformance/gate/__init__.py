"""The CI gate of a port: profiles, waivers, baselines, JUnit XML and the pytest plugin's shared rules.

profile   read and validate [tool.refnorm] / refnorm.toml
plan      profile + command line -> one run plan per kernel
waivers   known failures accepted until a date; the gate outcome of a case
baseline  fail a passed output whose error grew over an earlier run
decide    apply baseline and waivers to a results document: doc["gate"]
junit     JUnit XML from results documents
diff      what changed between two results documents
worker    one worker process kept across cases (the pytest plugin)
cli       `refnorm check --profile/--baseline/--junit`, `refnorm gate`, `refnorm diff`
"""

from .decide import apply_gate, gate_lines
from .profile import Profile, ProfileError, Waiver, find_profile, load_profile

__all__ = ["Profile", "ProfileError", "Waiver", "find_profile", "load_profile", "apply_gate", "gate_lines"]
