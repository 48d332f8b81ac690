"""The gravity check's defaults, importable without numpy: ``safety-filter check-gravity
--help`` shows them and answers without loading the numeric libraries."""

from __future__ import annotations

DEFAULT_REST_VELOCITY = 0.02  # [rad/s or m/s]
MIN_REST_S = 0.2  # [s] shortest run of still samples that counts as rest
DEFAULT_MIN_SAMPLES = 20
DEFAULT_TOPIC = 'joint_states'
DEFAULT_DURATION_S = 5.0
