"""A small bounded run shared by the bit-for-bit tests of this folder."""

from __future__ import annotations

from fe3d.case.builder import Layer, Material, Solver, Source, Species, Time, box_case
from fe3d.case.schema import Case


def two_species_strip(solver: Solver | None = None) -> Case:
    """A 30 m sand strip with two sorbing species fed at the west face for 2 d."""
    sand = Material(10.0, 10.0, porosity=0.3, bulk_density=1600.0,
                    longitudinal_dispersivity=0.5, transverse_dispersivity=0.05)
    return box_case(
        length=30.0, width=4.0, cell=1.0, dz=1.0, heads={"west": 1.5, "east": 0.0},
        layers=[Layer("sand", -2.0, sand)],
        species=[Species("fast", limit=0.01, kd=0.0), Species("slow", limit=0.01, kd=0.2)],
        sources=[Source("inlet_fast", species="fast", shape="face_patch", face="west",
                        concentration="100 mg/L", stop=2.0),
                 Source("inlet_slow", species="slow", shape="face_patch", face="west",
                        concentration="50 mg/L", stop=2.0)],
        time=Time(6.0, 0.5), solver=solver)
