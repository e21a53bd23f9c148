//! The two output lines, alarm and fault, on any embedded-hal 1.0 [`OutputPin`].
//!
//! A [`Line`] owns its pin, knows whether the pin is active-high or active-low, and remembers the
//! logical level it last drove, so it can tell the caller when the pin actually changed.

use embedded_hal::digital::OutputPin;

/// Which electrical level means "on".
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum ActiveLevel {
    /// On = high (a relay driver or an LED to ground).
    High,
    /// On = low (an open-drain line with a pull-up, an LED to the supply).
    Low,
}

/// A pin that changed level.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub struct PinChange {
    /// The logical level now: `true` = on.
    pub active: bool,
    /// The electrical level now: `true` = high.
    pub high: bool,
}

/// A logical output line on a pin.
#[derive(Debug)]
pub struct Line<P> {
    pin: P,
    active_level: ActiveLevel,
    active: Option<bool>,
}

impl<P: OutputPin> Line<P> {
    /// Take the pin. It is not driven until the first [`Line::set`].
    pub const fn new(pin: P, active_level: ActiveLevel) -> Self {
        Self {
            pin,
            active_level,
            active: None,
        }
    }

    /// The logical level last driven, or `None` before the first [`Line::set`].
    pub const fn is_active(&self) -> Option<bool> {
        self.active
    }

    /// The electrical level that means `active`.
    pub const fn level_for(&self, active: bool) -> bool {
        match self.active_level {
            ActiveLevel::High => active,
            ActiveLevel::Low => !active,
        }
    }

    /// Drive the line to `active`. Touches the pin only when the level changes (or on the first
    /// call), and then says what it drove. A failed write is retried on the next call.
    pub fn set(&mut self, active: bool) -> Result<Option<PinChange>, P::Error> {
        if self.active == Some(active) {
            return Ok(None);
        }
        let high = self.level_for(active);
        if high {
            self.pin.set_high()?;
        } else {
            self.pin.set_low()?;
        }
        self.active = Some(active);
        Ok(Some(PinChange { active, high }))
    }

    /// Give the pin back.
    pub fn release(self) -> P {
        self.pin
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use embedded_hal_mock::eh1::digital::{Mock, State, Transaction};

    #[test]
    fn active_low_inverts_and_only_changes_touch_the_pin() {
        let expected = [
            Transaction::set(State::High),
            Transaction::set(State::Low),
            Transaction::set(State::High),
        ];
        let mut pin = Mock::new(&expected);
        let mut line = Line::new(pin.clone(), ActiveLevel::Low);
        assert_eq!(line.is_active(), None);
        assert_eq!(
            line.set(false),
            Ok(Some(PinChange {
                active: false,
                high: true
            }))
        );
        assert_eq!(line.set(false), Ok(None));
        assert_eq!(
            line.set(true),
            Ok(Some(PinChange {
                active: true,
                high: false
            }))
        );
        assert_eq!(line.set(true), Ok(None));
        assert_eq!(
            line.set(false),
            Ok(Some(PinChange {
                active: false,
                high: true
            }))
        );
        pin.done();
    }
}
