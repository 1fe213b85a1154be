"""Reading the ``[firmware]`` table into :class:`~loopcheck.design.firmware.FirmwareSettings`.

Bad input raises :class:`loopcheck.io.casefile.CaseError` with one line naming
the file, the table and the key.
"""

from __future__ import annotations

from loopcheck.design.firmware import (
    _C_IDENT,
    DEFAULT_PEAK_SHIFT_LIMIT,
    FIRMWARE_KEYS,
    PREFIX_MAX_CHARS,
    ROUNDING_MODES,
    SCALE_LIMITS,
    FirmwareScaling,
    FirmwareSettings,
    NumberFormat,
    parse_number_format,
)


def read_firmware_settings(table: dict, where: str, damping_gain_used: bool = True) -> tuple[FirmwareSettings, list[str]]:
    """Read a raw ``[firmware]`` table (as tomllib returned it).

    ``where`` is the message prefix (``"cases/x.toml: [firmware]"``);
    ``damping_gain_used``: whether Hi is non-zero (then a missing
    capacitor-current scaling is worth a warning). Returns
    the settings and warnings; raises :class:`loopcheck.io.casefile.CaseError`
    with one line naming the file and key on bad input."""
    from loopcheck.io.casefile import (
        CaseError,
        check_keys,
        read_choice,
        read_quantity,
        read_string,
    )

    t = table
    check_keys(t, FIRMWARE_KEYS, where)
    warnings: list[str] = []

    def err(key: str, detail: str) -> CaseError:
        return CaseError(f"{where} {key}: {detail}")

    def whole(key: str, lo: int, hi: int) -> int | None:
        if key not in t:
            return None
        v = t[key]
        if isinstance(v, bool) or not isinstance(v, int) or not lo <= v <= hi:
            from loopcheck.engine.units import shown

            raise err(key, f"expected a whole number from {lo} to {hi}, got {shown(v)}")
        return v

    def either(direct: str, parts: tuple[str, ...]) -> str | None:
        has_parts = [k for k in parts if k in t]
        if direct in t and has_parts:
            raise err(direct, f"give either {direct} or {' with '.join(parts)}, not both")
        if direct in t:
            return "direct"
        return "parts" if has_parts else None

    # ADC (shared by both current sensors)
    adc_bits = whole("adc_bits", 1, 32)
    adc_fs = read_quantity(t, "adc_full_scale", "voltage", where, None, positive=True)

    def counts_from_sensor(sensor_key: str) -> tuple[float, str]:
        sensor = read_quantity(t, sensor_key, "gain", where, positive=True)
        if adc_bits is None or adc_fs is None:
            missing = [k for k, v in (("adc_bits", adc_bits), ("adc_full_scale", adc_fs)) if v is None]
            raise err(sensor_key, f"needs the ADC in [firmware] too; missing: {', '.join(missing)}")
        counts = sensor * (1 << adc_bits) / adc_fs
        note = f"{sensor:g} V/A * 2^{adc_bits} counts / {adc_fs:g} V = {counts:.10g} count/A"
        return counts, note

    cur_kind = either("current_counts_per_A", ("current_sensor",))
    ic_kind = either("ic_counts_per_A", ("ic_sensor",))
    mod_kind = either("modulator_counts_per_V", ("dc_link", "pwm_period_counts"))
    if cur_kind is None and (adc_bits is not None or adc_fs is not None):
        raise err("current_sensor", "missing; adc_bits and adc_full_scale are given, so give the current sensor gain too")

    scaling = None
    if cur_kind or mod_kind or ic_kind:
        if cur_kind is None:
            raise err("current_counts_per_A", "missing; firmware units need the regulated current's scaling "
                      "(current_counts_per_A, or current_sensor with adc_bits and adc_full_scale)")
        if mod_kind is None:
            raise err("modulator_counts_per_V", "missing; firmware units need the modulator scaling "
                      "(modulator_counts_per_V, or dc_link with pwm_period_counts)")
        notes = []
        if cur_kind == "direct":
            cur = read_quantity(t, "current_counts_per_A", "ratio", where, positive=True)
            notes.append(f"regulated current: {cur:.10g} count/A (given)")
        else:
            cur, n = counts_from_sensor("current_sensor")
            notes.append(f"regulated current: {n}")
        if ic_kind == "direct":
            icc = read_quantity(t, "ic_counts_per_A", "ratio", where, positive=True)
            notes.append(f"capacitor current: {icc:.10g} count/A (given)")
        elif ic_kind == "parts":
            icc, n = counts_from_sensor("ic_sensor")
            notes.append(f"capacitor current: {n}")
        else:
            icc = cur
            notes.append("capacitor current: same scaling as the regulated current (no ic_sensor given)")
            if damping_gain_used:
                warnings.append(
                    f"{where} ic_sensor: not given; the capacitor current is taken to have the regulated "
                    f"current's scaling ({cur:.6g} count/A) -- check that it does"
                )
        if mod_kind == "direct":
            mod = read_quantity(t, "modulator_counts_per_V", "ratio", where, positive=True)
            notes.append(f"modulator: {mod:.10g} count/V (given)")
        else:
            for k in ("dc_link", "pwm_period_counts"):
                if k not in t:
                    raise err(k, "missing; the modulator scaling needs both dc_link and pwm_period_counts")
            vdc = read_quantity(t, "dc_link", "voltage", where, positive=True)
            period = read_quantity(t, "pwm_period_counts", "ratio", where, positive=True)
            mod = period / vdc
            notes.append(
                f"modulator: {period:g} counts (duty 1) / {vdc:g} V = {mod:.10g} count/V "
                f"(u = (CMP/{period:g} - 1/2) * {vdc:g} V, leg voltage against the dc-link midpoint)"
            )
        for key, value, unit in (("current_counts_per_A" if cur_kind == "direct" else "current_sensor", cur, "count/A"),
                                 ("ic_counts_per_A" if ic_kind == "direct" else "ic_sensor", icc, "count/A"),
                                 ("modulator_counts_per_V" if mod_kind == "direct" else "pwm_period_counts", mod, "count/V")):
            if not SCALE_LIMITS[0] <= value <= SCALE_LIMITS[1]:
                raise err(key, f"gives {value:g} {unit}, outside the range this tool exports "
                               f"({SCALE_LIMITS[0]:g} to {SCALE_LIMITS[1]:g} {unit}; see docs/case-file.md)")
        scaling = FirmwareScaling(cur, icc, mod, tuple(notes))
    rounding = read_choice(t, "rounding", ROUNDING_MODES, where, "nearest-even")
    fmt = NumberFormat()
    if "format" in t:
        text = read_string(t, "format", where)
        try:
            fmt, fnotes = parse_number_format(text, rounding)
        except ValueError as exc:
            raise err("format", str(exc)) from None
        warnings += [f"{where} format: {n}" for n in fnotes]
    if "rounding" in t and not fmt.is_fixed:
        warnings.append(f"{where} rounding: applies to fixed-point formats only; ignored for {fmt.label}")
    prefix = read_string(t, "prefix", where, "LC_")
    if not _C_IDENT.fullmatch(prefix) or len(prefix) > PREFIX_MAX_CHARS:
        from loopcheck.engine.units import shown

        raise err("prefix", f'expected the start of a C identifier (letters, digits, "_"; not starting with a digit; '
                            f'at most {PREFIX_MAX_CHARS} characters), got {shown(prefix)}')
    limit = read_quantity(t, "peak_shift_limit", "percent", where, DEFAULT_PEAK_SHIFT_LIMIT, positive=True)
    return FirmwareSettings(scaling, fmt, prefix, limit), warnings
