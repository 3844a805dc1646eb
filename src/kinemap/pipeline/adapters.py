"""From config sections to the keyword arguments of the public stage functions.

The config schema (:mod:`kinemap.pipeline.config`) is the one source of defaults; these
adapters only rename and parse (strings like '-50,120' into ranges), so a TOML file, the
command line and a Python call with the same values run the same code.
"""
from __future__ import annotations

from kinemap.errors import KinemapError

__all__ = ["read_kwargs", "continuum_kwargs", "reference_line", "noise_kwargs", "mask_kwargs",
           "moments_kwargs", "fit_kwargs", "rings_kwargs", "rings3d_kwargs", "widths_kwargs",
           "turbulence_kwargs", "parse_vrange", "parse_line_free", "spectrum_kwargs",
           "pv_kwargs", "channels_kwargs",
           "stack_geometry", "check_stack"]


def parse_vrange(value):
    """'-50,120' or [v1, v2] -> [v1, v2] (strings keep their units); None stays None."""
    if value is None:
        return None
    if isinstance(value, str):
        parts = [p for p in value.replace(" ", "").split(",") if p]
        if len(parts) != 2:
            raise KinemapError(f"'vrange' must be two velocities like '-50,120', got {value!r}")
        return parts
    return list(value)


def parse_line_free(value):
    """'v1,v2;v3,v4' (km/s) or [[v1, v2], ...] -> list of pairs; 'auto' or None -> None."""
    if value is None or (isinstance(value, str) and value.strip().lower() == "auto"):
        return None
    if isinstance(value, str):
        try:
            return [tuple(float(x) for x in part.split(",")) for part in value.split(";") if part]
        except ValueError:
            raise KinemapError(f"'line_free' must look like '-300,-200;250,400' (km/s), "
                               f"got {value!r}") from None
    return value


def reference_line(cfg: dict) -> str | None:
    """The run's line: [maps] line, else the first of [maps] lines, else the first
    [widths] line of a widths run."""
    if cfg["maps"]["line"]:
        return cfg["maps"]["line"]
    if cfg["maps"]["lines"]:
        return cfg["maps"]["lines"][0]
    if "widths" in cfg.get("_sections", ()) and cfg["widths"]["lines"]:
        return cfg["widths"]["lines"][0]
    return None


def read_kwargs(cfg: dict) -> dict:
    """[input] -> read_cube.  [maps] line sets the rest value (unless --rest-value does);
    a widths run's first line is the fallback when the header has no rest value either."""
    inp = cfg["input"]
    rest = inp["rest_value"] or cfg["maps"]["line"]
    return dict(convention=inp["convention"], rest_value=rest, frame=inp["frame"],
                vrange=parse_vrange(inp["vrange"]), box=inp["box"], region=inp["region"],
                beams=inp["beams"], bunit=inp["bunit"], hdu=inp["hdu"], beam=inp["beam"],
                line=reference_line(cfg), unit=inp["unit"])


def continuum_kwargs(cfg: dict) -> dict:
    c = cfg["continuum"]
    return dict(method=c["method"], line=reference_line(cfg), line_window=c["line_window"],
                clip=c["clip"], write_cube=c["write_continuum"],
                line_free=parse_line_free(cfg["noise"]["line_free"]),
                catalogue=cfg["widths"]["catalogue"])


def noise_kwargs(cfg: dict) -> dict:
    return dict(line_free=parse_line_free(cfg["noise"]["line_free"]),
                channel_response=cfg["maps"]["channel_response"])


def mask_kwargs(cfg: dict) -> dict:
    m = cfg["mask"]
    return dict(method=m["method"], threshold=m["threshold"], grow_threshold=m["grow_threshold"],
                smooth_beams=m["smooth_beams"], smooth_pixels=m["smooth_pixels"],
                smooth_channels=m["smooth_channels"], min_pixels=m["min_pixels"],
                min_channels=m["min_channels"], channel_response=cfg["maps"]["channel_response"],
                file=m["file"], mode=m["mode"])


def moments_kwargs(cfg: dict) -> dict:
    return dict(channel_response=cfg["maps"]["channel_response"])


def fit_kwargs(cfg: dict) -> dict:
    m = cfg["maps"]
    return dict(components=m["components"], baseline=m["baseline"],
                channel_response=m["channel_response"], instrument_sigma=m["instrument_sigma"],
                resolving_power=m["resolving_power"], order=m["order"], snr_threshold=m["snr_threshold"],
                min_separation=m["min_separation"], min_component_snr=m["min_component_snr"])


def rings_kwargs(cfg: dict) -> dict:
    r = cfg["rings"]
    return dict(center=r["center"], position_angle=r["position_angle"],
                inclination=r["inclination"], v_sys=r["v_sys"],
                ring_width=r["ring_width"],
                distance=r["distance"], weighting=r["weighting"],
                exclude_minor_axis=r["exclude_minor_axis"], stages=r["stages"],
                final_geometry=r["final_geometry"], fix=r["fix"], min_points=r["min_points"],
                bootstrap=r["bootstrap"], seed=r["seed"],
                expansion_in_geometry=r["expansion_in_geometry"], pv_diagram=r["pv_diagram"])


def widths_kwargs(cfg: dict) -> dict:
    w, m = cfg["widths"], cfg["maps"]
    return dict(lines=w["lines"], temperature=w["temperature"],
                temperature_err=w["temperature_err"], mu=w["mu"],
                free_velocity=w["free_velocity"], ratios=w["ratios"], catalogue=w["catalogue"],
                snr_threshold=w["snr_threshold"], baseline=w["baseline"],
                instrument_sigma=m["instrument_sigma"],
                resolving_power=m["resolving_power"], channel_response=m["channel_response"])


def rings3d_kwargs(cfg: dict) -> dict:
    """Keyword arguments of :func:`kinemap.rings.stage3d.fit_rings_3d`."""
    r = cfg["rings"]
    return dict(center=r["center"], position_angle=r["position_angle"],
                inclination=r["inclination"], v_sys=r["v_sys"], ring_width=r["ring_width"],
                distance=r["distance"], stages=r["stages"], final_geometry=r["final_geometry"],
                fix=r["fix"], bootstrap=r["bootstrap"], seed=r["seed"],
                expansion=r["expansion_in_geometry"], scale_height=r["scale_height"],
                loss=r["loss"], smoothing=r["smoothing"],
                surface_normalisation=r["surface_normalisation"],
                channel_response=cfg["maps"]["channel_response"])


def turbulence_kwargs(cfg: dict) -> dict:
    t = cfg["turbulence"]
    return dict(velocity_field=t["velocity_field"], distance=t["distance"],
                lag_range=t["lag_range"], nlags=t["nlags"], weighting=t["weighting"],
                gradient_window=t["gradient_window"], nsizes=t["nsizes"],
                jackknife_blocks=t["jackknife_blocks"])


# --- extraction: kinemap spectrum and kinemap pv ---

def spectrum_kwargs(cfg: dict) -> dict:
    """[spectrum] (and [input] region) -> extract_spectrum.  Exactly one of a position, a
    region or the global profile is asked for; the region itself is applied by the reader
    (the cube's footprint), so it is not passed again."""
    sp = cfg["spectrum"]
    chosen = [flag for flag, given in (("--at", sp["at"]), ("--region", cfg["input"]["region"]),
                                       ("--global", sp["global"])) if given]
    if len(chosen) != 1:
        raise KinemapError("give one of --at RA,DEC (with --radius), --region FILE or --global"
                           + (f", not {' and '.join(chosen)}" if chosen else ""))
    if sp["radius"] is not None and sp["at"] is None:
        raise KinemapError("--radius needs --at RA,DEC (the centre of the circle)")
    return dict(at=sp["at"], radius=sp["radius"], snr_threshold=sp["snr_threshold"])


def pv_kwargs(cfg: dict) -> dict:
    """[pv] -> pv_diagram (the ring table is read by the runner)."""
    p = cfg["pv"]
    return dict(path=p["path"], center=p["center"], position_angle=p["position_angle"],
                length=p["length"], width=p["width"], region=p["region"])
# ---- channel maps and stacking ----------------------------------------------------------
def channels_kwargs(cfg: dict) -> dict:
    """[channels] -> :func:`kinemap.maps.channels.channel_maps`."""
    c = cfg["channels"]
    return dict(every=c["every"], levels=c["levels"],
                channel_response=cfg["maps"]["channel_response"])


def stack_geometry(cfg: dict, beam_arcsec: float | None, pixel_arcsec: float) -> dict:
    """[stack] radius-bin geometry: centre, PA, inclination and edges or width, from the
    options or a rings table (not both).  Numbers may carry units ('40 deg')."""
    from kinemap.units import to_value

    s = cfg["stack"]
    given = [k for k in ("center", "position_angle", "inclination") if s[k] is not None]
    if s["rings"]:
        if given:
            raise KinemapError(f"give either --rings or --{given[0].replace('_', '-')} (the "
                               "rings table has the geometry), not both")
        from kinemap.io.tables import read_ring_geometry

        g = read_ring_geometry(s["rings"])
        if s["edges"] is not None:
            g["edges"] = s["edges"]
        return dict(g, bin_width=None)
    missing = [k for k in ("center", "position_angle", "inclination") if s[k] is None]
    if missing:
        raise KinemapError("radius bins need the disk's --center, --position-angle and "
                           f"--inclination (missing: {', '.join(missing)}), or --rings "
                           "rotation_curve.ecsv, or --bins MAP.fits --edges ...")
    width = s["bin_width"]
    if width is not None:
        width = to_value(width, "arcsec", name="bin_width")
    elif beam_arcsec:
        width = beam_arcsec
    else:
        width = 4 * pixel_arcsec
    return dict(center=s["center"],
                position_angle=to_value(s["position_angle"], "deg", name="position_angle"),
                inclination=to_value(s["inclination"], "deg", name="inclination"),
                edges=s["edges"], bin_width=width)


def check_stack(cfg: dict) -> None:
    """[stack] mistakes found before the cube is read: bins that cannot be made."""
    s = cfg["stack"]
    if s["bins"].strip().lower() != "radius":
        if s["edges"] is None:
            raise KinemapError("binning by a map needs --edges (bin edges in the units of the "
                               "map, e.g. '0,1,2,5')")
        from kinemap.stacking.bins import check_edges

        check_edges(s["edges"], "values of the bin map")
        return
    geometry = stack_geometry(cfg, None, 1.0)
    from kinemap.stacking.bins import check_edges, check_inclination

    check_inclination(geometry["inclination"])
    if geometry["edges"] is not None:
        check_edges(geometry["edges"], "radii in arcsec")
