"""Case text for the tests that still edit TOML text (tests/unit/studies/test_refinement.py).

New tests build their cases with :mod:`fe3d.case.builder`; remove this file once
``box_case_text`` has no user left.
"""

from __future__ import annotations

_MATERIAL = """
[materials.{name}]
horizontal_conductivity = "{kh} m/d"
vertical_conductivity = "{kv} m/d"
porosity = {por}
bulk_density = "{rho} kg/m^3"
longitudinal_dispersivity = "{al} m"
transverse_dispersivity = "{at} m"
"""


def box_case_text(
    *, length: float, width: float, layers: list[tuple[str, float, float, float]],
    heads: dict[str, float], cell: float, dz: float, extra: str = "",
    porosity: float = 0.25, bulk_density: float = 1600.0, alpha_l: float = 1.0,
    alpha_t: float = 0.1, end: str = "10 d", step: str = "1 d", species: str = "",
) -> str:
    """A box case: ``layers`` are (name, bottom [m], K_h [m/d], K_v [m/d]) from the top at 0 m."""
    text = [f'title = "verification box"\n[box]\nx = ["0 m", "{length} m"]\n'
            f'y = ["0 m", "{width} m"]\ntop = "0 m"\n']
    for name, _b, kh, kv in layers:
        text.append(_MATERIAL.format(name=name, kh=kh, kv=kv, por=porosity, rho=bulk_density,
                                     al=alpha_l, at=alpha_t))
    for name, bottom, _kh, _kv in layers:
        text.append(f'[[layers]]\nname = "{name}"\nmaterial = "{name}"\nbottom = "{bottom} m"\n')
    for face, h in heads.items():
        text.append(f'[[fixed_heads]]\nface = "{face}"\nhead = "{h} m"\n')
    text.append(species or '[species.tracer]\nlimit = "1 mg/L"\n')
    text.append(f'[time]\nend = "{end}"\nstep = "{step}"\n')
    text.append(f'[mesh]\ncell_size = "{cell} m"\nlayer_cell_thickness = "{dz} m"\n')
    text.append(extra)
    return "\n".join(text)
