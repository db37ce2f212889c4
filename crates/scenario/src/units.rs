//! Exact parsing of quantities with units: durations, sizes and bandwidths.
//!
//! A quantity is a non-negative decimal number (`12`, `1.25`, `.5`) followed by a
//! unit, with optional spaces between. Values are converted with integer
//! arithmetic, so `1.2ms` is exactly 1,200,000 ns; a value that is not a whole
//! number of the base unit (nanoseconds, bytes, bytes per second) is refused
//! rather than rounded.

/// Accepted duration units.
pub const DURATION_UNITS: &str = "ns, us, ms, s";
/// Accepted size units.
pub const SIZE_UNITS: &str = "B, kB, MB, GB, TB (powers of 10), KiB, MiB, GiB, TiB (powers of 2)";
/// Accepted bandwidth units.
pub const BANDWIDTH_UNITS: &str =
    "B/s, kB/s, MB/s, GB/s, TB/s, KiB/s, MiB/s, GiB/s, bit/s, kbit/s, Mbit/s, Gbit/s, Tbit/s";

/// Accepted arithmetic-speed units.
pub const FLOP_RATE_UNITS: &str = "FLOP/s, kFLOP/s, MFLOP/s, GFLOP/s, TFLOP/s, PFLOP/s";
/// Accepted count suffixes.
pub const COUNT_SUFFIXES: &str = "none, k (thousand), M (million), B (billion), T (trillion)";

/// A multiplier expressed as `num / den` of the base unit.
pub(crate) type Scale = (u128, u128);

pub(crate) const DURATION: &[(&str, Scale)] =
    &[("ns", (1, 1)), ("us", (1_000, 1)), ("ms", (1_000_000, 1)), ("s", (1_000_000_000, 1))];

pub(crate) const SIZE: &[(&str, Scale)] = &[
    ("B", (1, 1)),
    ("kB", (1_000, 1)),
    ("MB", (1_000_000, 1)),
    ("GB", (1_000_000_000, 1)),
    ("TB", (1_000_000_000_000, 1)),
    ("KiB", (1 << 10, 1)),
    ("MiB", (1 << 20, 1)),
    ("GiB", (1 << 30, 1)),
    ("TiB", (1 << 40, 1)),
];

pub(crate) const BANDWIDTH: &[(&str, Scale)] = &[
    ("B/s", (1, 1)),
    ("kB/s", (1_000, 1)),
    ("MB/s", (1_000_000, 1)),
    ("GB/s", (1_000_000_000, 1)),
    ("TB/s", (1_000_000_000_000, 1)),
    ("KiB/s", (1 << 10, 1)),
    ("MiB/s", (1 << 20, 1)),
    ("GiB/s", (1 << 30, 1)),
    ("bit/s", (1, 8)),
    ("kbit/s", (1_000, 8)),
    ("Mbit/s", (1_000_000, 8)),
    ("Gbit/s", (1_000_000_000, 8)),
    ("Tbit/s", (1_000_000_000_000, 8)),
];

pub(crate) const FLOP_RATE: &[(&str, Scale)] = &[
    ("FLOP/s", (1, 1)),
    ("kFLOP/s", (1_000, 1)),
    ("MFLOP/s", (1_000_000, 1)),
    ("GFLOP/s", (1_000_000_000, 1)),
    ("TFLOP/s", (1_000_000_000_000, 1)),
    ("PFLOP/s", (1_000_000_000_000_000, 1)),
];

pub(crate) const COUNT: &[(&str, Scale)] =
    &[("", (1, 1)), ("k", (1_000, 1)), ("M", (1_000_000, 1)), ("B", (1_000_000_000, 1)), ("T", (1_000_000_000_000, 1))];

/// Splits `"1.25 ms"` into the exact decimal `125 / 10^2` and the unit text.
fn split_number(text: &str) -> Result<(u128, u32, &str), String> {
    let t = text.trim();
    if t.starts_with('-') {
        return Err(format!("`{text}` must not be negative"));
    }
    let lower = t.to_ascii_lowercase();
    if ["nan", "inf", "+inf", "infinity", ".nan", ".inf"].iter().any(|w| lower.starts_with(w)) {
        return Err(format!("`{text}` is not a number"));
    }
    let end = t.find(|c: char| !(c.is_ascii_digit() || c == '.')).unwrap_or(t.len());
    let (num, unit) = t.split_at(end);
    if num.is_empty() || num == "." {
        return Err(format!("`{text}` does not start with a number"));
    }
    let after = unit.trim_start();
    let exponent = after
        .strip_prefix(['e', 'E'])
        .is_some_and(|r| r.starts_with(|c: char| c.is_ascii_digit() || c == '-' || c == '+'));
    if exponent {
        return Err(format!(
            "`{text}` is written with an exponent; write the number out in full (0.001 rather than 1e-3)"
        ));
    }
    let (int, frac) = num.split_once('.').unwrap_or((num, ""));
    if frac.contains('.') {
        return Err(format!("`{text}` has more than one decimal point"));
    }
    if int.len() + frac.len() > 30 {
        return Err(format!("`{text}` has too many digits"));
    }
    let digits: u128 = format!("{int}{frac}").parse().map_err(|_| format!("`{text}` is not a number"))?;
    Ok((digits, frac.len() as u32, unit.trim()))
}

fn parse(text: &str, table: &[(&str, Scale)], what: &str, accepted: &str, base: &str) -> Result<u64, String> {
    let (digits, decimals, unit) = split_number(text)?;
    if unit.is_empty() && !table.iter().any(|(u, _)| u.is_empty()) {
        return Err(format!("`{text}` needs a unit; {what} accepts {accepted}"));
    }
    let Some(&(_, (num, den))) = table.iter().find(|(u, _)| *u == unit) else {
        return Err(format!("unknown unit `{unit}` in `{text}`; {what} accepts {accepted}"));
    };
    let divisor = 10u128.pow(decimals) * den;
    let scaled = digits.checked_mul(num).ok_or_else(|| format!("`{text}` is too large"))?;
    if scaled % divisor != 0 {
        return Err(format!("`{text}` is not a whole number of {base}"));
    }
    u64::try_from(scaled / divisor).map_err(|_| format!("`{text}` is too large"))
}

/// Parses an arithmetic speed into FLOP per second.
pub fn parse_flop_per_s(text: &str) -> Result<u64, String> {
    parse(text, FLOP_RATE, "a speed", FLOP_RATE_UNITS, "FLOP per second")
}

/// Parses a count such as `350M` or `1.2B` (powers of 10).
pub fn parse_count(text: &str) -> Result<u64, String> {
    parse(text, COUNT, "a count", COUNT_SUFFIXES, "units")
}

/// Parses a duration into nanoseconds.
pub fn parse_duration_ns(text: &str) -> Result<u64, String> {
    parse(text, DURATION, "a duration", DURATION_UNITS, "nanoseconds")
}

/// Parses a size into bytes.
pub fn parse_bytes(text: &str) -> Result<u64, String> {
    parse(text, SIZE, "a size", SIZE_UNITS, "bytes")
}

/// Parses a bare decimal number as a quantity in `unit` (a unit of the
/// duration table, e.g. `ms` for a profile's `forward_ms` column); messages
/// echo `text` as written.
pub fn parse_duration_in(text: &str, unit: &str) -> Result<u64, String> {
    let (_, _, rest) = split_number(text)?;
    if !rest.is_empty() {
        return Err(format!("`{text}` is not a plain number of {unit}"));
    }
    parse_duration_ns(&format!("{}{unit}", text.trim()))
        .map_err(|m| m.replace(&format!("{}{unit}", text.trim()), text.trim()))
}

/// Parses a bandwidth into bytes per second.
pub fn parse_bytes_per_s(text: &str) -> Result<u64, String> {
    parse(text, BANDWIDTH, "a bandwidth", BANDWIDTH_UNITS, "bytes per second")
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn durations_are_exact() {
        assert_eq!(parse_duration_ns("1.2ms"), Ok(1_200_000));
        assert_eq!(parse_duration_ns("5us"), Ok(5_000));
        assert_eq!(parse_duration_ns("0ns"), Ok(0));
        assert_eq!(parse_duration_ns("2 s"), Ok(2_000_000_000));
        assert_eq!(parse_duration_ns(".5us"), Ok(500));
        assert_eq!(parse_duration_ns("0.333333333s"), Ok(333_333_333));
    }

    #[test]
    fn sizes_use_powers_of_ten_and_two() {
        assert_eq!(parse_bytes("8MiB"), Ok(8 * 1024 * 1024));
        assert_eq!(parse_bytes("8MB"), Ok(8_000_000));
        assert_eq!(parse_bytes("1.5KiB"), Ok(1536));
        assert_eq!(parse_bytes("0B"), Ok(0));
        assert_eq!(parse_bytes("2TiB"), Ok(2 << 40));
    }

    #[test]
    fn bandwidths_in_bytes_and_bits() {
        assert_eq!(parse_bytes_per_s("64GB/s"), Ok(64_000_000_000));
        assert_eq!(parse_bytes_per_s("100Gbit/s"), Ok(12_500_000_000));
        assert_eq!(parse_bytes_per_s("1 GiB/s"), Ok(1 << 30));
    }

    #[test]
    fn counts_and_speeds() {
        assert_eq!(parse_count("350M"), Ok(350_000_000));
        assert_eq!(parse_count("1.2B"), Ok(1_200_000_000));
        assert_eq!(parse_count("7"), Ok(7));
        assert!(parse_count("1.5").unwrap_err().contains("whole number"));
        assert!(parse_count("3X").unwrap_err().contains("unknown unit"));
        assert_eq!(parse_flop_per_s("400TFLOP/s"), Ok(400_000_000_000_000));
        assert_eq!(parse_flop_per_s("1.5 PFLOP/s"), Ok(1_500_000_000_000_000));
    }

    #[test]
    fn refusals_name_the_accepted_units() {
        let e = parse_duration_ns("5").unwrap_err();
        assert!(e.contains("needs a unit") && e.contains("ns, us, ms, s"), "{e}");
        let e = parse_bytes("3 parsecs").unwrap_err();
        assert!(e.contains("unknown unit `parsecs`") && e.contains("MiB"), "{e}");
        assert!(parse_duration_ns("0.5ns").unwrap_err().contains("whole number"));
        assert_eq!(parse_duration_ns("-1ms").unwrap_err(), "`-1ms` must not be negative");
        assert!(parse_duration_ns("1e-3ms").unwrap_err().contains("written with an exponent"));
        assert!(parse_duration_ns("2E6ns").unwrap_err().contains("written with an exponent"));
        assert_eq!(parse_duration_ns("NaN").unwrap_err(), "`NaN` is not a number");
        assert_eq!(parse_bytes("inf MB").unwrap_err(), "`inf MB` is not a number");
        assert!(parse_duration_ns("1.2.3ms").is_err());
        assert!(parse_bytes("99999999999TiB").unwrap_err().contains("too large"));
        assert!(parse_bytes("1Mib").is_err(), "units are case-sensitive");
    }
}
