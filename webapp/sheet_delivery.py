"""The design sheet's delivery rows: what the delivery chain did and verified, and the
destination profile's numbers with their sources.

Rows are plain tuples ``(label, key, value[, unit[, text]])`` for the sheet's tables
(:func:`webapp.sheet._table`); no HTML here.
"""

__all__ = ["chain_rows", "verification_rows", "profile_rows"]

_LAYOUT_TEXT = {"keep": "as recorded", "mono": "mono fold-down", "pick": "one channel picked",
                "stereo": "stereo from mono"}


def chain_rows(result):
    """The delivery fields the chain applied beyond word length, dither, ceiling and loudness."""
    d = result.delivery
    layout = _LAYOUT_TEXT[d.channel_layout]
    if d.channel_layout == "mono":
        layout += f" ({d.mono_law} law)"
    elif d.channel_layout == "pick":
        layout += f" (channel {d.pick_channel})"
    rows = [("channel layout", "delivery.channel_layout", d.channel_layout, "", layout),
            ("loudness tolerance", "delivery.loudness_tolerance_lu", d.loudness_tolerance_lu, "LU"),
            ("limiter", "delivery.limiter", d.limiter, "",
             "on" if d.limiter else "off"),
            ("most limiting allowed", "delivery.max_limiting_db", d.max_limiting_db, "dB"),
            ("filter", "filter_applied", result.filter_applied, "",
             "applied" if result.filter_applied else "none: same rate in and out")]
    kbps = (result.delivery_report or {}).get("mp3_kbps")
    if kbps is not None:
        rows.append(("MP3 bit rate", "delivery.mp3_kbps", kbps, "kbit/s", f"{kbps} kbit/s, "
                     f"{d.mp3_mode}"))
    return rows


def verification_rows(result):
    """What the verification of the delivered file found."""
    r = result.delivery_report or {}
    met = r.get("met")
    text = {True: "met", False: "NOT met: " + "; ".join(r.get("notes") or ()),
            None: "nothing promised (report only)"}[met]
    rows = [("delivery", "delivery_report.met", met, "", text),
            ("verified on", "delivery_report.verified_on", r.get("verified_on")),
            ("write passes", "delivery_report.write_passes", r.get("write_passes"))]
    lim = r.get("limiter")
    if lim:
        rows += [("largest gain reduction", "delivery_report.limiter.max_gain_reduction_db",
                  lim["max_gain_reduction_db"], "dB"),
                 ("time limiting", "delivery_report.limiter.limited_s", lim["limited_s"], "s")]
    decoded = r.get("decoded")
    if decoded:
        rows += [("decoded loudness", "delivery_report.decoded.integrated_lufs",
                  decoded.get("integrated_lufs"), "LUFS"),
                 ("decoded true peak", "delivery_report.decoded.true_peak_dbtp",
                  decoded.get("true_peak_dbtp"), "dBTP")]
    for name in r.get("carried_chunks") or ():
        rows.append(("carried chunk", None, name, "", f"{name} (positions rescaled to "
                                                      f"{result.fs_out} Hz)"))
    return rows


def _delivered_value(result, field):
    if field == "rate_hz":
        return result.fs_out
    if field == "container":
        return {"WAV": "wav", "RF64": "wav", "FLAC": "flac", "MP3": "mp3"}.get(result.output_format)
    if field == "preset":
        return None
    return getattr(result.delivery, field, None)


def profile_rows(profile, result):
    """Each sourced number of ``profile`` (a :class:`webapp.profiles.Profile`): its value and
    where it comes from, or "set by the user" when the conversion delivered another value."""
    rows = [("destination", "profile.name", profile.name, "", profile.label)]
    for field, source in profile.sources.items():
        value = getattr(profile, field)
        delivered = _delivered_value(result, field)
        if field in ("rate_hz",) and value is None:
            value = delivered     # the profile keeps the source's rate
        if field != "preset" and delivered != value and source != "set by the user":
            source = f"set by the user (the profile says {value})"
            value = delivered
        rows.append((field.replace("_", " "), f"profile.{field}", value, "", f"{value}: {source}"))
    return rows
