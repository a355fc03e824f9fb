fn main() {
    let args: Vec<String> = std::env::args().skip(1).collect();
    let sets: Vec<String> = args[1..].to_vec();
    match mnemon_spec::load(std::path::Path::new(&args[0]), &sets) {
        Ok(r) => {
            print!("{}", mnemon_spec::explain(&r));
            for (l, _) in mnemon_spec::expand(&r).unwrap_or_default() {
                println!("variant {l}");
            }
        }
        Err(e) => eprintln!("{e}"),
    }
}
