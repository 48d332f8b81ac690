"""When the demo arms' certificate can be reused, and how the demo certifies them.

``safety-filter demo`` and ``safety-filter stress`` (on a demo arm without ``--certificate``)
keep a demo arm's certificate in their output folder and certify the arm again only when
that file cannot be reused (:func:`reusable_certificate`).
"""

from __future__ import annotations

from pathlib import Path

from safety_filter.core.certificate import Certificate
from safety_filter.core.robot_model import RobotModel
from safety_filter.errors import CertificateError

# The demo certifies with the defaults of `safety-filter certify` but 20 000 falsifier
# states instead of 100 000 (the falsifier is an independent check on top of the
# certification; the certificate must still pass it, so a demo certificate is a real one).
# Saves about ten seconds.
DEMO_FALSIFIER_STATES = 20_000
DEMO_CONTROL_RATE_HZ = 1000.0  # the control rate of the demo's simulated graph [Hz]


def reusable_certificate(model: RobotModel, path: Path, control_rate_hz: float
                         ) -> tuple[Certificate | None, str]:
    """The certificate at ``path`` if the demo can reuse it, with the reason if not.

    Reusable: it loads, belongs to ``model`` (model hash), is certified and is for
    ``control_rate_hz``.
    """
    if not path.is_file():
        return None, 'no certificate yet'
    try:
        certificate = Certificate.load(path, model)
    except CertificateError as err:
        return None, f'the existing certificate is not reusable: {err}'
    if not certificate.certified:
        return None, 'the existing certificate is not certified'
    if abs(certificate.control_rate_hz - control_rate_hz) > 1e-9:
        return None, (f'the existing certificate is for {certificate.control_rate_hz:g} Hz, '
                      f'the demo runs at {control_rate_hz:g} Hz')
    return certificate, 'reused (model hash matches)'
