//! Exact ages from ISO dates (YYYY-MM-DD).
//!
//! Convention (common practice; conventions differ between fields): decimal
//! age by the anniversary rule. Age is the number of birthdays completed plus
//! the fraction of the current birthday year that has passed, counted in
//! days: `years + (date − last birthday) / (next birthday − last birthday)`.
//! A year between birthdays therefore has 365 or 366 days as the calendar
//! has it, and a child is exactly 10.0 on their tenth birthday. A 29 February
//! birthday falls on 28 February in common years. Ages are decimal years, not
//! completed years.

/// A calendar date.
#[derive(Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord)]
pub struct Date {
    /// Year.
    pub year: i32,
    /// Month, 1–12.
    pub month: u32,
    /// Day of the month, 1–31.
    pub day: u32,
}

fn is_leap(year: i32) -> bool {
    (year % 4 == 0 && year % 100 != 0) || year % 400 == 0
}

fn days_in_month(year: i32, month: u32) -> u32 {
    match month {
        1 | 3 | 5 | 7 | 8 | 10 | 12 => 31,
        4 | 6 | 9 | 11 => 30,
        _ => {
            if is_leap(year) {
                29
            } else {
                28
            }
        }
    }
}

impl Date {
    /// Parse `YYYY-MM-DD` (surrounding spaces allowed); `None` when malformed
    /// or not a real calendar date.
    pub fn parse(s: &str) -> Option<Date> {
        let s = s.trim();
        let mut parts = s.split('-');
        let (y, m, d) = (parts.next()?, parts.next()?, parts.next()?);
        if parts.next().is_some() || y.len() != 4 || m.len() != 2 || d.len() != 2 {
            return None;
        }
        let year: i32 = y.parse().ok()?;
        let month: u32 = m.parse().ok()?;
        let day: u32 = d.parse().ok()?;
        if !(1..=12).contains(&month) || day == 0 || day > days_in_month(year, month) {
            return None;
        }
        Some(Date { year, month, day })
    }

    /// Days since 1970-01-01 (proleptic Gregorian calendar; the
    /// days-from-civil algorithm of Hinnant, "chrono-Compatible Low-Level Date
    /// Algorithms", 2013).
    pub fn days(self) -> i64 {
        let (y, m, d) = (self.year as i64, self.month as i64, self.day as i64);
        let y = if m <= 2 { y - 1 } else { y };
        let era = if y >= 0 { y } else { y - 399 } / 400;
        let yoe = y - era * 400;
        let mp = (m + 9) % 12;
        let doy = (153 * mp + 2) / 5 + d - 1;
        let doe = yoe * 365 + yoe / 4 - yoe / 100 + doy;
        era * 146_097 + doe - 719_468
    }

    /// The birthday of someone born on `self`, in `year`.
    fn birthday_in(self, year: i32) -> Date {
        if self.month == 2 && self.day == 29 && !is_leap(year) {
            Date {
                year,
                month: 2,
                day: 28,
            }
        } else {
            Date {
                year,
                month: self.month,
                day: self.day,
            }
        }
    }
}

/// A date as a decimal calendar year: the year plus the elapsed share of it,
/// in days (1 January is `year + 0`).
pub fn decimal_year(date: Date) -> f64 {
    let start = Date {
        year: date.year,
        month: 1,
        day: 1,
    }
    .days();
    let next = Date {
        year: date.year + 1,
        month: 1,
        day: 1,
    }
    .days();
    date.year as f64 + (date.days() - start) as f64 / (next - start) as f64
}

/// Decimal age at `date` of someone born on `birth`, by the anniversary rule;
/// `None` when `date` is before `birth`.
pub fn decimal_age(birth: Date, date: Date) -> Option<f64> {
    if date < birth {
        return None;
    }
    let mut years = date.year - birth.year;
    let mut last = birth.birthday_in(birth.year + years);
    if last > date {
        years -= 1;
        last = birth.birthday_in(birth.year + years);
    }
    let next = birth.birthday_in(birth.year + years + 1);
    let frac = (date.days() - last.days()) as f64 / (next.days() - last.days()) as f64;
    Some(years as f64 + frac)
}

#[cfg(test)]
mod tests {
    use super::*;

    fn d(s: &str) -> Date {
        Date::parse(s).unwrap()
    }

    // Closed form: 1970-01-01 is day 0; 2000-03-01 is day 11017 (10957 days
    // to 2000-01-01, plus 31 + 29).
    #[test]
    fn day_numbers() {
        assert_eq!(d("1970-01-01").days(), 0);
        assert_eq!(d("2000-01-01").days(), 10_957);
        assert_eq!(d("2000-03-01").days(), 11_017);
        assert_eq!(d("1969-12-31").days(), -1);
    }

    #[test]
    fn malformed_and_impossible_dates_are_rejected() {
        for s in [
            "2023-02-29",
            "2023-13-01",
            "2023-00-10",
            "2023-04-31",
            "23-01-01",
            "2023/01/01",
            "2023-1-1",
            "",
            "abcd-ef-gh",
        ] {
            assert!(Date::parse(s).is_none(), "{s}");
        }
        assert!(Date::parse("2024-02-29").is_some());
    }

    // A hand-computed table by the anniversary rule (years completed plus the
    // elapsed share of the current birthday year, in days).
    #[test]
    fn hand_computed_ages() {
        let table = [
            ("2010-05-10", "2020-05-10", 10.0),                 // a birthday
            ("2010-05-10", "2020-05-09", 9.0 + 365.0 / 366.0), // the day before; 2019-05-10..2020-05-10 spans 29 Feb: 366 days
            ("2010-01-01", "2010-07-02", 182.0 / 365.0),       // 182 days into a common year
            ("2011-03-01", "2012-03-01", 1.0),                 // across a leap day
            ("2011-03-01", "2012-02-29", 365.0 / 366.0),       // leap day itself, in a 366-day birthday year
            ("2008-02-29", "2009-02-28", 1.0),                 // leap-day birthday, common year: 28 Feb
            ("2008-02-29", "2012-02-29", 4.0),                 // leap-day birthday on a leap day
            ("2008-02-29", "2009-03-01", 1.0 + 1.0 / 365.0),   // 2009-02-28..2010-02-28 has 365 days
            ("2000-12-31", "2001-01-01", 1.0 / 365.0),         // one day old in 2001's birthday year
            ("1999-06-15", "2024-12-01", 25.0 + 169.0 / 365.0), // 2024-06-15..2025-06-15: 365 days; 169 elapsed
            ("2015-08-20", "2015-08-20", 0.0),                 // day of birth
        ];
        for (birth, date, want) in table {
            let got = decimal_age(d(birth), d(date)).unwrap();
            assert!((got - want).abs() < 1e-12, "{birth} → {date}: {got} vs {want}");
        }
        // A twelfth pair by hand: birthdays 2015-02-28 (common year) and
        // 2016-02-29 (leap year) are 366 days apart; 2016-02-28 is 365 days
        // after the first.
        let got = decimal_age(d("2012-02-29"), d("2016-02-28")).unwrap();
        assert!((got - (3.0 + 365.0 / 366.0)).abs() < 1e-12, "{got}");
        assert!(decimal_age(d("2020-01-02"), d("2020-01-01")).is_none());
    }
}
