"""A viewer session on the synthetic CDW scene: topograph, dI/dV maps, and lock-in maps at the CDW wavevectors.

Run it with ``python examples/viewer_session.py`` (needs ``pip install 'cdw-domains[napari]'``).
The Lock-in and Domain analysis widgets are docked on the right: "Show spectrum"
there opens the power spectrum, where wavevectors can be picked and sigma tuned.

With the environment variable ``DOMAINS_EXAMPLE_HEADLESS=1`` the viewer is built
without being shown and closed again, so the script can run in a test suite.
"""

from __future__ import annotations

import os
import sys


def main() -> int:
    try:
        import napari
    except ImportError:
        print("napari is not installed; install the viewer extra: pip install 'cdw-domains[napari]'")
        return 0
    import numpy as np

    import domains
    from domains.pipeline import make_scene
    from napari_plugin import AnalysisWidget, LockinWidget, lockin_layer_data, scan_layer_data

    headless = os.environ.get("DOMAINS_EXAMPLE_HEADLESS") == "1"
    scene = make_scene("cdw")
    topo = scene.topography
    viewer = napari.Viewer(title="cdw-domains: synthetic CDW scene", show=not headless)

    layers = [scan_layer_data(topo, name="CDW topography")]
    layers += [scan_layer_data(m, name=f"CDW dI/dV {m.bias_V:+.2f} V") for m in scene.maps]
    for data, kwargs, kind in layers:
        getattr(viewer, f"add_{kind}")(data, **kwargs)

    # The scene's own CDW wavevectors; on measured data they come from the
    # spectrum (the Lock-in widget's "Show spectrum").
    q = np.asarray(scene.truth["q_cdw_rad_per_nm"], dtype=float)
    sigma_nm, _ = domains.choose_sigma(q)
    for data, kwargs, kind in lockin_layer_data(topo.data, q, sigma_nm=sigma_nm, pixel_size_nm=topo.pixel_size_nm,
                                                mask=topo.mask, source="CDW topography"):
        getattr(viewer, f"add_{kind}")(data, **kwargs)
    print(f"lock-in at {len(q)} CDW wavevectors, sigma = {sigma_nm:.3f} nm; layers: "
          + ", ".join(layer.name for layer in viewer.layers))

    lockin_widget = LockinWidget(viewer)
    viewer.window.add_dock_widget(lockin_widget, name="Lock-in", area="right")
    viewer.window.add_dock_widget(AnalysisWidget(viewer), name="Domain analysis", area="right")

    if headless:
        viewer.close()
        return 0
    napari.run()
    return 0


if __name__ == "__main__":
    sys.exit(main())
