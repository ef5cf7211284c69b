use tessera_worker::engine::affine::StateSet;
use tessera_worker::engine::interval::Interval;
use tessera_worker::engine::plant::Plant;
use tessera_worker::engine::spec::EngineOptions;
fn main() {
    let plant = Plant::from_text(&["x", "y"], &[], &[], &["y", "(1 - x^2) * y - x"]).unwrap();
    for (order, sub, gpd) in [(4u32, 4u32, 8u32), (4, 16, 8), (6, 4, 8), (4, 4, 30), (4, 4, 3)] {
        let mut opts = EngineOptions::default();
        opts.taylor_order = order; opts.substeps = sub; opts.generators_per_dim = gpd;
        let mut set = StateSet::from_box(&[Interval::new(-1.05, -0.95), Interval::new(0.95, 1.05)]);
        let mut line = format!("order {order} sub {sub} gpd {gpd}:");
        let t = std::time::Instant::now();
        for k in 1..=50 {
            let f = plant.integrate_period(&set, &[], &[], 0.1, &opts).unwrap();
            set = f.end;
            if k % 10 == 0 {
                let b = set.to_box();
                line += &format!(" {k}:[{:.3} {:.3}] ", b[0].width(), b[1].width());
            }
        }
        println!("{line} {:?}", t.elapsed());
    }
}
