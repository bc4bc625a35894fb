//! What one picture shows. The tags are read off these parameters, so the ground truth is
//! exact by construction.

use rand::seq::IndexedRandom;
use rand::Rng;

#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum TimeOfDay {
    Day,
    Dusk,
    Night,
}

#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Weather {
    Clear,
    Fog,
    Rain,
    Snow,
}

#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Season {
    Spring,
    Summer,
    Autumn,
    Winter,
}

#[derive(Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord)]
pub enum Subject {
    Harbour,
    Boats,
    Lighthouse,
    Market,
    Orchard,
    Bridge,
    FestivalLights,
    Cliffs,
    Beach,
}

pub const TIMES: [&str; 3] = ["day", "dusk", "night"];
pub const WEATHERS: [&str; 4] = ["clear", "fog", "rain", "snow"];
pub const SEASONS: [&str; 4] = ["spring", "summer", "autumn", "winter"];
pub const SUBJECTS: [Subject; 9] = [
    Subject::Harbour,
    Subject::Boats,
    Subject::Lighthouse,
    Subject::Market,
    Subject::Orchard,
    Subject::Bridge,
    Subject::FestivalLights,
    Subject::Cliffs,
    Subject::Beach,
];
/// Tag for open water in the picture; derived, not chosen.
pub const SEA: &str = "sea";

impl TimeOfDay {
    pub fn tag(self) -> &'static str {
        TIMES[self as usize]
    }
}

impl Weather {
    pub fn tag(self) -> &'static str {
        WEATHERS[self as usize]
    }
}

impl Season {
    pub fn tag(self) -> &'static str {
        SEASONS[self as usize]
    }
}

impl Subject {
    pub fn tag(self) -> &'static str {
        match self {
            Subject::Harbour => "harbour",
            Subject::Boats => "boats",
            Subject::Lighthouse => "lighthouse",
            Subject::Market => "market",
            Subject::Orchard => "orchard",
            Subject::Bridge => "bridge",
            Subject::FestivalLights => "festival-lights",
            Subject::Cliffs => "cliffs",
            Subject::Beach => "beach",
        }
    }
}

#[derive(Debug, Clone)]
pub struct Scene {
    pub time: TimeOfDay,
    pub weather: Weather,
    pub season: Season,
    /// One to three subjects, sorted, no repeats.
    pub subjects: Vec<Subject>,
    /// Whether open water is drawn (always with harbour, boats or beach; sometimes below
    /// a lighthouse or cliffs).
    pub sea: bool,
}

impl Scene {
    pub fn sample(rng: &mut impl Rng) -> Scene {
        let time = [TimeOfDay::Day, TimeOfDay::Dusk, TimeOfDay::Night][pick(rng, &[5, 2, 3])];
        let season = [
            Season::Spring,
            Season::Summer,
            Season::Autumn,
            Season::Winter,
        ][rng.random_range(0..4)];
        // Snow falls in winter, now and then in early spring; never in summer or autumn.
        let weights: &[u32] = match season {
            Season::Winter => &[4, 2, 1, 3],
            Season::Spring => &[6, 2, 3, 1],
            _ => &[6, 2, 3, 0],
        };
        let weather =
            [Weather::Clear, Weather::Fog, Weather::Rain, Weather::Snow][pick(rng, weights)];
        let n = [1, 2, 3][pick(rng, &[4, 4, 2])];
        let mut subjects: Vec<Subject> = SUBJECTS.choose_multiple(rng, n).copied().collect();
        subjects.sort();
        let has = |s| subjects.contains(&s);
        let sea = has(Subject::Harbour)
            || has(Subject::Boats)
            || has(Subject::Beach)
            || ((has(Subject::Lighthouse) || has(Subject::Cliffs)) && rng.random_bool(0.6));
        Scene {
            time,
            weather,
            season,
            subjects,
            sea,
        }
    }

    pub fn has(&self, s: Subject) -> bool {
        self.subjects.contains(&s)
    }

    /// Every tag the picture deserves, in a fixed order: time, weather, season, subjects, sea.
    pub fn true_tags(&self) -> Vec<&'static str> {
        let mut tags = vec![self.time.tag(), self.weather.tag(), self.season.tag()];
        tags.extend(self.subjects.iter().map(|s| s.tag()));
        if self.sea {
            tags.push(SEA);
        }
        tags
    }
}

/// Index drawn with the given integer weights.
pub fn pick(rng: &mut impl Rng, weights: &[u32]) -> usize {
    let mut r = rng.random_range(0..weights.iter().sum::<u32>());
    for (i, &w) in weights.iter().enumerate() {
        if r < w {
            return i;
        }
        r -= w;
    }
    weights.len() - 1
}

#[cfg(test)]
mod tests {
    use super::*;
    use rand::SeedableRng;
    use rand_chacha::ChaCha8Rng;

    #[test]
    fn sampled_scenes_respect_the_rules() {
        let mut rng = ChaCha8Rng::seed_from_u64(7);
        let mut seen_snow = false;
        for _ in 0..2000 {
            let s = Scene::sample(&mut rng);
            assert!((1..=3).contains(&s.subjects.len()));
            assert!(s.subjects.windows(2).all(|w| w[0] < w[1]));
            if s.has(Subject::Harbour) || s.has(Subject::Boats) || s.has(Subject::Beach) {
                assert!(s.sea);
            }
            if s.weather == Weather::Snow {
                seen_snow = true;
                assert!(matches!(s.season, Season::Winter | Season::Spring));
            }
            let tags = s.true_tags();
            assert_eq!(tags.len(), 3 + s.subjects.len() + usize::from(s.sea));
        }
        assert!(seen_snow);
    }

    #[test]
    fn pick_never_returns_a_zero_weight() {
        let mut rng = ChaCha8Rng::seed_from_u64(1);
        for _ in 0..1000 {
            assert_ne!(pick(&mut rng, &[3, 0, 1]), 1);
        }
    }
}
