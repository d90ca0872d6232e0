//! Shared by the speed examples.

use kiln::Picture;

/// A `w × h` RGB test picture: a smooth gradient with texture. Any content codes; the
/// transforms' cost does not depend on it.
pub fn test_picture(w: u32, h: u32) -> Picture {
    let data: Vec<u8> = (0..w * h)
        .flat_map(|i| {
            let (x, y) = (i % w, i / w);
            [(x / 3) as u8, (y / 2) as u8, ((x * 7 + y * 13) % 251) as u8]
        })
        .collect();
    Picture { width: w, height: h, channels: 3, data }
}
