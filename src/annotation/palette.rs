//! The label colours and their plain names.

/// Eight label colours, chosen to stay apart from each other and from the viridis, magma and
/// cividis maps they are drawn over (no two share a hue family; lightness alternates).
pub const PALETTE: [[u8; 3]; 8] = [
    [255, 112, 40],  // orange
    [40, 200, 255],  // sky blue
    [235, 40, 150],  // magenta
    [150, 240, 60],  // lime
    [255, 230, 40],  // yellow
    [150, 90, 255],  // violet
    [255, 255, 255], // white
    [200, 30, 30],   // red
];

/// Plain names of the [`PALETTE`] colours, for captions.
pub const PALETTE_NAMES: [&str; 8] = [
    "orange", "sky blue", "magenta", "lime", "yellow", "violet", "white", "red",
];

/// A colour's palette name, or `#rrggbb` for a colour outside the palette.
pub fn colour_name(c: [u8; 3]) -> String {
    match PALETTE.iter().position(|&p| p == c) {
        Some(i) => PALETTE_NAMES[i].to_string(),
        None => format!("#{:02x}{:02x}{:02x}", c[0], c[1], c[2]),
    }
}
