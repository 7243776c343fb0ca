"""Site meshes: a gmsh plan-view triangulation extruded through the layers into tetrahedra, or
a tetrahedral mesh read from a file; the mesher's report, point location and material values
per cell."""

from fe3d.mesh.site_mesh import SiteMesh

__all__ = ["SiteMesh"]
