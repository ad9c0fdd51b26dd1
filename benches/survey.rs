//! Benchmark of the survey engine (run with `cargo bench --bench survey`): the deep
//! photometric demo survey (surveys/survey_deep_photo.toml, 7 bins), P, B and P+B, three
//! shapes, k_max(z = 0) = 0.3 h/Mpc.
//!
//! 1. Gaussian covariance: the triangle quadrature (exact first bins plus continuum)
//!    against the exact triangle sum, which is the oracle: time and the largest relative
//!    difference of sigma over probes and shapes (target: >= 20x faster, within 1%).
//! 2. The realistic covariance (the default) with the quadrature: time.
//!
//! Prints; asserts nothing.

use std::time::Instant;

use ngreach::cosmology::{Background, Cosmology, Growth, LinearPower, Primordial};
use ngreach::input::{Source, parse_toml};
use ngreach::shapes::Shape;
use ngreach::survey::fisher::{ShapeInput, SurveyForecast, SurveySettings, survey_fisher};
use ngreach::survey::triangles::TriangleRule;
use ngreach::survey::{CovarianceModel, SurveyFile};

const SURVEY: &str = include_str!("../surveys/survey_deep_photo.toml");

fn sigmas(fc: &SurveyForecast) -> Vec<f64> {
    fc.total[0]
        .iter()
        .flat_map(|f| {
            (0..f.len())
                .map(|i| f.sigma_conditional(i))
                .collect::<Vec<_>>()
        })
        .collect()
}

fn main() {
    let c = Cosmology::planck2018();
    let bg = Background::new(&c);
    let growth = Growth::new(&c);
    let power = LinearPower::eisenstein_hu(&c);
    let prim = Primordial::new(&c);
    let src = Source::from_text("survey_deep_photo.toml", SURVEY);
    let file: SurveyFile = parse_toml(&src).expect("demo survey parses");
    let mut survey = file
        .survey
        .resolve(&src, &bg, &growth)
        .expect("demo survey is valid");
    let shapes: Vec<Shape> = ["local", "equilateral", "orthogonal"]
        .iter()
        .map(|s| s.parse().unwrap())
        .collect();
    let inputs: Vec<ShapeInput> = shapes.iter().map(|&s| ShapeInput::new(s, prim)).collect();
    let kmax = [0.3 * c.h()];
    let threads = rayon::current_num_threads();
    let run = |survey: &ngreach::survey::Survey, exact: bool| {
        let settings = SurveySettings {
            triangles: TriangleRule {
                exact_bins: if exact {
                    None
                } else {
                    TriangleRule::default().exact_bins
                },
                ..TriangleRule::default()
            },
            ..SurveySettings::default()
        };
        let t = Instant::now();
        let fc = survey_fisher(survey, &power, &bg, &inputs, &kmax, &settings);
        (t.elapsed().as_secs_f64(), fc)
    };
    survey.covariance = CovarianceModel::Gaussian;
    let (t_quad, fc_quad) = run(&survey, false);
    let (t_exact, fc_exact) = run(&survey, true);
    let worst = sigmas(&fc_quad)
        .iter()
        .zip(sigmas(&fc_exact))
        .filter(|(a, b)| a.is_finite() && b.is_finite())
        .map(|(a, b)| (a / b - 1.0).abs())
        .fold(0.0, f64::max);
    println!(
        "deep photometric demo survey, 7 bins, k_max(0) = 0.3 h/Mpc, P/B/P+B, 3 shapes, gaussian covariance, {threads} threads:"
    );
    println!(
        "  exact triangle sum {t_exact:.2} s wall, quadrature {t_quad:.2} s wall: {:.1}x faster (target >= 20x); worst sigma difference {:.3}% (target < 1%)",
        t_exact / t_quad,
        100.0 * worst
    );
    survey.covariance = CovarianceModel::Realistic;
    let (t_real, fc_real) = run(&survey, false);
    let s = fc_real.total[0][2].sigma_marginal_or_inf();
    println!(
        "  realistic covariance, quadrature: {t_real:.2} s wall; P+B sigma_marginal(local, eq, orth) = {:.3}, {:.2}, {:.3}",
        s[0], s[1], s[2]
    );
}
