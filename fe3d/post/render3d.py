"""One 3D picture: the surface where a concentration equals its limit, inside the site's
outline, rendered off-screen by pyvista (VTK). No display or GPU is needed: VTK falls back
to an off-screen EGL context, which Mesa's software rasteriser serves (docs/outputs.md)."""

from __future__ import annotations

import logging
from pathlib import Path

import numpy as np

from fe3d._typing import FloatArray, IndexArray
from fe3d.post.cut_grid import crossing_grid
from fe3d.post.files import write_atomic
from fe3d.post.maps import SiteFeatures

__all__ = ["load_renderer", "render_limit_surface"]

logger = logging.getLogger(__name__)


def load_renderer() -> None:
    """Load what the first off-screen picture of a process pays once, so that a later
    :func:`render_limit_surface` does not wait for it: pyvista's plotting (VTK's rendering
    libraries) and the software OpenGL driver, by rendering an 8 × 8 pixel scene (measured
    on this machine: 0.9 s of imports, then a first picture 0.35 s against 0.09 s for the
    next). Nothing when no off-screen context can be made (the view then says why)."""
    import pyvista as pv

    try:
        with pv.vtk_verbosity("off"):
            plotter = pv.Plotter(off_screen=True, window_size=[8, 8])
            plotter.add_mesh(pv.Box())
            plotter.screenshot(return_img=True)
        plotter.close()
    except (RuntimeError, OSError):  # render_limit_surface logs it when it is asked for
        return


def render_limit_surface(path: Path, points: FloatArray, cells: IndexArray,
                         values: FloatArray, limit: float, *, features: SiteFeatures,
                         label: str, vertical_scale: float = 5.0,
                         window: tuple[int, int] = (1200, 800)) -> Path | None:
    """Render the surface ``values`` = ``limit`` (both [kg/m³]; any consistent unit) with
    the site outline at the ground and the model's bounding box, the elevation stretched by
    ``vertical_scale``; ``label`` names the species, time and limit in the picture.

    Returns the PNG's path, or None (with the reason logged) when nothing exceeds the
    limit or no off-screen rendering context can be made on this machine.
    """
    import pyvista as pv

    if not float(values.max()) > limit:
        logger.info("no 3D view: nothing above the limit (%s)", label)
        return None
    grid = crossing_grid(points, cells, values - limit, {"c": values})
    if grid is None:  # every node above the limit: the surface would be the model's own
        logger.warning("no 3D view: the whole model is above the limit (%s); the model is "
                       "too small for this plume", label)
        return None
    surface = grid.contour([limit], scalars="c")
    stretch = (1.0, 1.0, vertical_scale)
    top = float(points[2].max())
    ring = np.vstack([features.outline.xy, np.full(features.outline.xy.shape[1], top)]).T
    outline = pv.lines_from_points(np.vstack([ring, ring[:1]]))
    try:
        with pv.vtk_verbosity("off"):  # VTK's note that it found no X display, then uses EGL
            plotter = pv.Plotter(off_screen=True, window_size=list(window))
            plotter.add_mesh(pv.Box(bounds=_bounds(points)).outline(), color="gray",
                             line_width=1)
            plotter.add_mesh(outline, color="black", line_width=3)
            plotter.add_mesh(surface, color="firebrick", smooth_shading=True, opacity=0.85)
            for m in features.marks:
                if m.kind in ("extraction", "injection"):
                    well = pv.Line((m.x, m.y, top), (m.x, m.y, float(points[2].min())))
                    plotter.add_mesh(well, color="navy", line_width=4)
            plotter.set_scale(*stretch)
            plotter.add_text(f"{features.site}\n{label}\nvertical scale ×{vertical_scale:g}",
                             font_size=10, position="upper_left")
            plotter.add_text("Screening estimate: depends on the inputs; defer to local "
                             "regulations and licensed professional practice.",
                             font_size=7, position="lower_left")
            plotter.show_axes()
            plotter.view_vector((-0.35, -1.0, 0.7), viewup=(0.0, 0.0, 1.0))  # from the SSW
            plotter.reset_camera()
            plotter.camera.zoom(1.3)
            image = plotter.screenshot(return_img=True)
        plotter.close()
    except (RuntimeError, OSError) as err:  # no usable OpenGL context here
        logger.warning("no 3D view: off-screen rendering failed (%s)", err)
        return None
    from PIL import Image

    write_atomic(path, lambda p: Image.fromarray(image).save(p, format="PNG"))
    return path


def _bounds(points: FloatArray) -> tuple[float, float, float, float, float, float]:
    """(x_min, x_max, y_min, y_max, z_min, z_max) [m] of ``points`` ``(3, n)``."""
    lo, hi = points.min(axis=1), points.max(axis=1)
    return (float(lo[0]), float(hi[0]), float(lo[1]), float(hi[1]), float(lo[2]),
            float(hi[2]))
