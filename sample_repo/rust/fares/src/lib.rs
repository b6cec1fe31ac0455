//! Fare engine for Kestrune Cycleshare rides in Brindlemoor.
//!
//! A trip's base price comes from a [`FareTable`]; afterwards a chain of
//! [`FareRule`]s (discounts, caps) adjusts it in order.

use std::fmt;

/// The kind of bike a ride was taken on.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum BikeClass {
    Standard,
    Electric,
}

/// An amount of money in cents, as charged to the rider.
#[derive(Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord, Default)]
pub struct Fare {
    pub cents: u32,
}

impl fmt::Display for Fare {
    /// Formats the fare as crowns and cents, for example `3.45 cr`.
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(f, "{}.{:02} cr", self.cents / 100, self.cents % 100)
    }
}

/// Everything a rule needs to know about the ride being priced.
#[derive(Debug, Clone, Default)]
pub struct RideContext {
    pub minutes: u32,
    pub spent_today_cents: u32,
    pub rider_is_student: bool,
}

/// Unlock fee and per-minute prices for one bike class.
#[derive(Debug, Clone)]
pub struct FareTable {
    pub unlock_cents: u32,
    pub per_minute_cents: u32,
    pub overtime_after_minutes: u32,
    pub overtime_per_minute_cents: u32,
}

impl FareTable {
    /// Returns the standard price list for the given bike class.
    pub fn for_class(class: BikeClass) -> Self {
        match class {
            BikeClass::Standard => FareTable {
                unlock_cents: 100,
                per_minute_cents: 15,
                overtime_after_minutes: 45,
                overtime_per_minute_cents: 30,
            },
            BikeClass::Electric => FareTable {
                unlock_cents: 150,
                per_minute_cents: 30,
                overtime_after_minutes: 45,
                overtime_per_minute_cents: 30,
            },
        }
    }

    /// Computes the base price of a ride of the given length, before any discounts or caps.
    pub fn base_fare(&self, minutes: u32) -> Fare {
        let minutes = minutes.max(1);
        let overtime = minutes.saturating_sub(self.overtime_after_minutes);
        let cents = self.unlock_cents
            + minutes * self.per_minute_cents
            + overtime * self.overtime_per_minute_cents;
        Fare { cents: round_to_nickel(cents) }
    }

    pub fn is_free_ride(&self, minutes: u32) -> bool {
        minutes == 0 && self.unlock_cents == 0
    }
}

/// Rounds an amount in cents to the nearest five cents, halves going up.
pub fn round_to_nickel(cents: u32) -> u32 {
    (cents + 2) / 5 * 5
}

/// A pricing adjustment applied to a fare after the base price is known.
pub trait FareRule {
    /// Short name shown on itemised receipts.
    fn name(&self) -> &'static str;

    /// Returns the adjusted fare for this ride.
    fn adjust(&self, ctx: &RideContext, fare: Fare) -> Fare;
}

/// Limits the total a rider can be charged in a single day.
#[derive(Debug, Clone)]
pub struct DailyCap {
    pub max_cents: u32,
}

impl FareRule for DailyCap {
    /// Label printed next to the waived amount on receipts.
    fn name(&self) -> &'static str {
        "daily cap"
    }

    /// Stops charging a rider once their spending for the calendar day reaches the
    /// daily maximum; whatever part of this fare would go over the cap is waived.
    fn adjust(&self, ctx: &RideContext, fare: Fare) -> Fare {
        let room = self.max_cents.saturating_sub(ctx.spent_today_cents);
        Fare { cents: fare.cents.min(room) }
    }
}

/// Percentage discount for riders with a verified student account.
#[derive(Debug, Clone)]
pub struct StudentDiscount {
    pub percent: u32,
}

impl FareRule for StudentDiscount {
    fn name(&self) -> &'static str {
        "student discount"
    }

    /// Takes the student percentage off the fare when the rider is a verified student.
    fn adjust(&self, ctx: &RideContext, fare: Fare) -> Fare {
        if !ctx.rider_is_student {
            return fare;
        }
        let discounted = fare.cents * (100 - self.percent.min(100)) / 100;
        Fare { cents: round_to_nickel(discounted) }
    }
}

/// Prices whole rides by combining a fare table with an ordered list of rules.
pub struct FareEngine {
    table: FareTable,
    rules: Vec<Box<dyn FareRule>>,
}

impl FareEngine {
    /// Creates an engine with no adjustment rules.
    pub fn new(table: FareTable) -> Self {
        FareEngine { table, rules: Vec::new() }
    }

    /// Appends a rule; rules run in the order they were added.
    pub fn with_rule(mut self, rule: Box<dyn FareRule>) -> Self {
        self.rules.push(rule);
        self
    }

    /// Prices a ride and returns the final fare plus the names of the rules that changed it.
    pub fn price(&self, ctx: &RideContext) -> (Fare, Vec<&'static str>) {
        let mut fare = self.table.base_fare(ctx.minutes);
        let mut applied = Vec::new();
        for rule in &self.rules {
            let next = rule.adjust(ctx, fare);
            if next != fare {
                applied.push(rule.name());
            }
            fare = next;
        }
        (fare, applied)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn cap_waives_amount_over_limit() {
        let cap = DailyCap { max_cents: 1200 };
        let ctx = RideContext { minutes: 30, spent_today_cents: 1000, rider_is_student: false };
        assert_eq!(cap.adjust(&ctx, Fare { cents: 550 }).cents, 200);
    }

    /// Amounts ending in 2 round down and amounts ending in 3 round up.
    #[test]
    fn nickel_rounding() {
        assert_eq!(round_to_nickel(342), 340);
        assert_eq!(round_to_nickel(343), 345);
    }
}
