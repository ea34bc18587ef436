"""Shared texts for the template tests: a plain one-compartment oral template."""

from __future__ import annotations

_BODY = """\
kind = "pk"
time_unit = "h"

[states.depot]
unit = "mg"

[states.central]
unit = "mg"

[parameters.ka]
unit = "1/h"
default = 1.0
lower = 0.01
upper = 100.0

[parameters.ke]
unit = "1/h"
default = 0.1
lower = 0.001
upper = 10.0

[parameters.V]
unit = "L"
default = 30.0
lower = 0.1
upper = 3000.0

[equations]
depot = "-ka*depot"
central = "ka*depot - ke*central"

[doses.oral]
state = "depot"

[observables.concentration]
expression = "central / V"
unit = "mg/L"
"""


def oral_template(name: str, description: str) -> str:
    """A valid one-compartment oral template named ``name`` (the file stem must match)."""
    return f'name = "{name}"\ndescription = "{description}"\n' + _BODY
