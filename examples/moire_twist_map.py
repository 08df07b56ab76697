"""Map the local twist of a synthetic twisted bilayer whose twist changes across the frame, and split it into twist domains.

The scene has two regions (1.05° left, 1.25° right) and a gentle twist gradient
along x inside each; the domains are connected regions of one twist range.

Run with no arguments: ``python examples/moire_twist_map.py``.
"""

import numpy as np

from domains.moire import moire_maps, twist_domains
from domains.synth.moire import twisted_bilayer

PIXEL_NM = 0.25
A_NM = 0.246  # lattice constant of the invented layers, nm


def main():
    image, truth = twisted_bilayer(shape=(384, 384), pixel_size_nm=PIXEL_NM, a_nm=A_NM, regions=[1.05, 1.25],
                                   twist_gradient_deg_per_nm=0.001, noise=0.3, rng=7)
    maps = moire_maps(image, pixel_size_nm=PIXEL_NM, a_nm=A_NM)
    s = maps.summary
    t = maps.trusted
    print(f"frame {image.shape[1] * PIXEL_NM:.0f} x {image.shape[0] * PIXEL_NM:.0f} nm, mode {s['mode']}, "
          f"lock-in sigma {s['sigma_nm']:.2f} nm")
    print(f"mean moiré period {s['period_nm']:.3f} nm (wavelengths "
          + ", ".join(f"{w:.3f}" for w in s["wavelengths_nm"]) + " nm)")
    print(f"twist from the mean moiré vectors: {s['twist_deg']:.4f} ± {s['twist_deg_err']:.4f} deg")
    lo, hi = np.nanpercentile(maps.twist_deg[t], [1, 99])
    print(f"local twist over the trusted region: mean {np.nanmean(maps.twist_deg[t]):.4f} deg, "
          f"1-99 % range {lo:.4f} .. {hi:.4f} deg "
          f"(truth {truth['theta_deg'][t].min():.4f} .. {truth['theta_deg'][t].max():.4f} deg)")
    # Away from the sharp region boundary (two lock-in widths), the map should follow the truth.
    x_nm = np.arange(image.shape[1]) * PIXEL_NM
    far = t & (np.abs(x_nm - truth["boundary_x_nm"][0]) > 2 * maps.sigma_nm)[None, :]
    print(f"largest deviation from the true map, away from the boundary: "
          f"{np.nanmax(np.abs(maps.twist_deg[far] - truth['theta_deg'][far])):.4f} deg")
    print(f"twist from moiré maxima (Delaunay, {s['n_triangles']} triangles): "
          f"{s['twist_from_maxima_deg']:.4f} ± {s['twist_from_maxima_deg_std']:.4f} deg")
    print(f"heterostrain {s['heterostrain_percent']:.3f} ± {s['heterostrain_percent_err']:.3f} % "
          f"along {s['heterostrain_angle_deg']:.1f} deg")

    dom = twist_domains(maps.twist_deg, pixel_size_nm=PIXEL_NM, twist_err_deg=maps.twist_deg_err,
                        resolution_nm=maps.sigma_nm, trusted=t)
    print(f"twist domains: {len(dom.table)} (tolerance {dom.tolerance_deg:.4f} deg, {dom.tolerance_source}; "
          f"smallest kept {dom.min_area_nm2:.0f} nm²)")
    for d in sorted(dom.table, key=lambda d: d["centroid_x_nm"]):
        print(f"  #{d['id']:2d}  twist {d['twist_deg_mean']:.4f} ± {d['twist_deg_std']:.4f} deg  "
              f"area {d['area_nm2']:7.1f} nm²  centroid ({d['centroid_x_nm']:.1f}, {d['centroid_y_nm']:.1f}) nm")


if __name__ == "__main__":
    main()
