//! Benchmark of the survey engine (run with `cargo bench --bench survey`): 10 redshift
//! bins, k_max = 0.2 h/Mpc, P+B with the full orientation dependence, 5 nuisances per bin,
//! three shapes. Target: at most 5 s wall on a 2-core machine. Prints the time; asserts
//! nothing.

use std::time::Instant;

use ngreach::cosmology::{Background, Cosmology, Growth, LinearPower, Primordial};
use ngreach::input::{Source, parse_toml};
use ngreach::shapes::Shape;
use ngreach::survey::SurveyFile;
use ngreach::survey::fisher::{ShapeInput, SurveySettings, survey_fisher};

const SURVEY: &str = r#"
[survey]
name = "bench"
area_deg2 = 15000.0
z_edges = [0.5, 0.7, 0.9, 1.1, 1.3, 1.5, 1.7, 1.9, 2.1, 2.3, 2.5]
redshift_error = 0.001
velocity_dispersion_km_s = 250.0

[[survey.tracer]]
nbar_h3_mpc3 = 3e-4
b0 = 0.9
"#;

fn main() {
    let c = Cosmology::planck2018();
    let bg = Background::new(&c);
    let growth = Growth::new(&c);
    let power = LinearPower::eisenstein_hu(&c);
    let prim = Primordial::new(&c);
    let src = Source::from_text("bench.toml", SURVEY);
    let file: SurveyFile = parse_toml(&src).expect("bench survey parses");
    let survey = file
        .survey
        .resolve(&src, &bg, &growth)
        .expect("bench survey is valid");
    let shapes: Vec<Shape> = ["local", "equilateral", "orthogonal"]
        .iter()
        .map(|s| s.parse().unwrap())
        .collect();
    let inputs: Vec<ShapeInput> = shapes.iter().map(|&s| ShapeInput::new(s, prim)).collect();
    let kmax = [0.05 * c.h(), 0.1 * c.h(), 0.2 * c.h()];
    for (label, parallel) in [("parallel", true), ("serial", false)] {
        let settings = SurveySettings {
            parallel,
            ..SurveySettings::default()
        };
        let t = Instant::now();
        let fc = survey_fisher(&survey, &power, &bg, &inputs, &kmax, &settings);
        let dt = t.elapsed().as_secs_f64();
        let s = fc.total[2][2].sigma_marginal_or_inf();
        println!(
            "survey engine ({label}, {} threads): 10 bins, kmax 0.2 h/Mpc, P+B, 3 shapes: {dt:.2} s wall (target <= 5 s); sigma(local, eq, orth) = {:.3}, {:.2}, {:.3}",
            if parallel {
                rayon::current_num_threads()
            } else {
                1
            },
            s[0],
            s[1],
            s[2]
        );
    }
}
