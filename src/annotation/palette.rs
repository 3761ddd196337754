//! The label colours and their plain names.

/// Eight label colours, chosen to stay apart from each other, from the window-grid and padding
/// colours and from every entry of the viridis, magma and cividis maps they are drawn over (at
/// least 25 CIE 1976 Delta E from each other and 30 from the maps; `tests/suite/render.rs`
/// checks it), with a lightness that shows on dark and light maps alike.
pub const PALETTE: [[u8; 3]; 8] = [
    [240, 144, 0],   // orange
    [48, 112, 240],  // blue
    [240, 0, 176],   // pink
    [0, 240, 0],     // green
    [0, 240, 240],   // cyan
    [240, 0, 0],     // red
    [160, 80, 240],  // violet
    [224, 144, 160], // rose
];

/// Plain names of the [`PALETTE`] colours, for captions.
pub const PALETTE_NAMES: [&str; 8] = [
    "orange", "blue", "pink", "green", "cyan", "red", "violet", "rose",
];

/// The colour pinned notes are marked in (kept apart from the palette and the maps too).
pub const PIN_COLOUR: [u8; 3] = [208, 160, 240];

/// A colour's palette name, or `#rrggbb` for a colour outside the palette.
pub fn colour_name(c: [u8; 3]) -> String {
    match PALETTE.iter().position(|&p| p == c) {
        Some(i) => PALETTE_NAMES[i].to_string(),
        None => format!("#{:02x}{:02x}{:02x}", c[0], c[1], c[2]),
    }
}
