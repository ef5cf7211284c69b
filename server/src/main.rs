fn main() {
    eprintln!("tessera-server: not built yet");
    std::process::exit(2);
}
