"""Site meshes: a gmsh plan-view triangulation extruded through the layers into tetrahedra."""

from fe3d.mesh.site_mesh import SiteMesh

__all__ = ["SiteMesh"]
