//! The plan for `arch = mechanical` (H = 1/2 p^T M(q)^-1 p + V(q)): the
//! structure the flag and the project key name, its default integrator
//! (implicit midpoint: the energy is not separable), and the refusals of
//! Stormer-Verlet and Yoshida-4 and of trajectory matching, each naming the
//! setting and the reason.

use visviva_runtime::Method;
use visviva_trainer::deploy::integrator::MethodName;
use visviva_trainer::learn::hnn::EnergyArch;
use visviva_trainer::learn::mode::check_trajectory_plan;
use visviva_trainer::learn::stage::{plan_model, SettingNames};
use visviva_trainer::learn::structure::{arch_choice, ActivationName, Arch, KineticKind};
use visviva_trainer::reference::build_system;
use visviva_trainer::reference::simulate::{simulate, SimulationSpec};

#[test]
fn mechanical_plan_defaults_to_midpoint_and_refuses_explicit_methods() {
    let system = build_system("double-pendulum", &[]).unwrap();
    let spec = SimulationSpec {
        trajectories: 2,
        duration: 1.0,
        rate: 20.0,
        seed: 1,
    };
    let train = simulate(system.as_ref(), &spec).unwrap();
    let choice = || {
        arch_choice(
            Arch::Mechanical,
            KineticKind::Quadratic,
            &[8],
            ActivationName::Tanh,
            "--activation",
        )
        .unwrap()
    };
    let plan = plan_model(
        &train,
        choice(),
        Default::default(),
        None,
        None,
        SettingNames::Flags,
    )
    .unwrap();
    assert_eq!(plan.integrator.method, Method::ImplicitMidpoint);
    let EnergyArch::Mechanical { potential, factor } = &plan.arch else {
        panic!("not a mechanical structure: {:?}", plan.arch)
    };
    assert_eq!(potential.sizes, [2, 8, 1]);
    // L(q) has n (n + 1) / 2 = 3 entries for two degrees of freedom.
    assert_eq!(factor.sizes, [2, 8, 3]);
    for (method, name) in [
        (MethodName::Verlet, "verlet"),
        (MethodName::Yoshida4, "yoshida4"),
    ] {
        let err = plan_model(
            &train,
            choice(),
            Default::default(),
            Some(method),
            None,
            SettingNames::ProjectKeys,
        )
        .unwrap_err()
        .to_string();
        assert!(
            err.contains(&format!("[model] integrator = \"{name}\""))
                && err.contains("not separable")
                && err.contains("M(q)"),
            "{err}"
        );
    }
    let err = check_trajectory_plan(&plan, &|k| format!("--fit-{k}"))
        .unwrap_err()
        .to_string();
    assert!(err.contains("--fit-mode = trajectory"), "{err}");
}
