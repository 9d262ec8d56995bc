//! Finding vessels in one band of a fundus image, so that a study's
//! segments can be proposed rather than clicked: a multiscale Hessian
//! vesselness on the log image, centre lines by non-maximum suppression
//! across the vessel, hysteresis and thinning, then the centre-line graph
//! split at branch points and crossings into polylines with sub-pixel
//! points.
//!
//! Working on `ln I` makes a vessel's response its optical density,
//! whatever the illumination or vignetting, so the thresholds are
//! contrasts: a dark vessel of depth `c` (in `ln I`) and Gaussian-like
//! width answers the σ²-normalised Hessian with about `0.38·c` at its best
//! scale (Lindeberg's scale normalisation with γ = 2; the 0.38 is
//! `2/(3√3)`, the maximum over σ for a Gaussian profile). A candidate must
//! exceed both that contrast floor and five times the response's own
//! noise, estimated from the image (the median absolute Laplacian), so a
//! field without vessels gives nothing.
//!
//! The kind of a vessel and its diameter are judged later, from profiles
//! across the proposed centre line ([`super::profile`]).

/// What counts as a vessel worth proposing, in pixels of the image.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct DetectSettings {
    pub min_diameter_px: f64,
    pub max_diameter_px: f64,
    /// Shorter pieces of centre line are not proposed.
    pub min_length_px: f64,
    /// Smallest vessel contrast (1 − T at the centre) proposed.
    pub min_contrast: f64,
}

/// The response of a Gaussian-profiled dark line at its best scale, per
/// unit depth in `ln I` (see the module docs).
const RESPONSE_PER_DEPTH: f64 = 0.385;
/// How many of the response's noise SDs a vessel must stand above.
const NOISE_SDS: f64 = 5.0;
/// The low hysteresis threshold, as a share of the high one.
const LOW_SHARE: f64 = 0.5;
/// Scales tried between the smallest and largest vessel.
const SCALES: usize = 7;
/// σ of the best scale for a cylinder of diameter d: the chord profile is
/// Gaussian-like with SD ≈ 0.31 d, and the γ = 2 response peaks at √2 of
/// that.
const SIGMA_PER_DIAMETER: f64 = 0.44;

/// The vesselness of every pixel at its best scale.
pub struct LineResponse {
    pub width: usize,
    pub height: usize,
    /// The response over its high threshold: at least 1 on a vessel.
    pub strength: Vec<f32>,
    /// Unit normal across the vessel at each pixel.
    pub normal: Vec<[f32; 2]>,
    /// The best scale's σ at each pixel.
    pub sigma: Vec<f32>,
    /// Noise SD of `ln I` per pixel, as estimated.
    pub noise: f64,
}

impl LineResponse {
    /// The diameter the best scale at pixel `i` stands for, px.
    pub fn diameter_px(&self, i: usize) -> f64 {
        self.sigma[i] as f64 / SIGMA_PER_DIAMETER
    }
}

/// Sampled Gaussian and its first two derivatives at `sigma`, radius 3σ.
fn kernels(sigma: f64) -> [Vec<f64>; 3] {
    let r = (3.0 * sigma).ceil().max(1.0) as isize;
    let g: Vec<f64> = (-r..=r)
        .map(|i| (-((i * i) as f64) / (2.0 * sigma * sigma)).exp())
        .collect();
    let z: f64 = g.iter().sum();
    let g: Vec<f64> = g.iter().map(|v| v / z).collect();
    let s2 = sigma * sigma;
    let d1 = (-r..=r)
        .zip(&g)
        .map(|(i, v)| -(i as f64) / s2 * v)
        .collect();
    let d2 = (-r..=r)
        .zip(&g)
        .map(|(i, v)| ((i * i) as f64 / (s2 * s2) - 1.0 / s2) * v)
        .collect();
    [g, d1, d2]
}

/// Convolves along rows (`horizontal`) or columns, edges clamped.
fn convolve(img: &[f64], w: usize, h: usize, k: &[f64], horizontal: bool) -> Vec<f64> {
    let r = (k.len() / 2) as isize;
    let mut out = vec![0.0; w * h];
    for y in 0..h {
        for x in 0..w {
            let mut acc = 0.0;
            for (j, kv) in k.iter().enumerate() {
                let o = j as isize - r;
                let v = if horizontal {
                    img[y * w + (x as isize + o).clamp(0, w as isize - 1) as usize]
                } else {
                    img[(y as isize + o).clamp(0, h as isize - 1) as usize * w + x]
                };
                acc += kv * v;
            }
            out[y * w + x] = acc;
        }
    }
    out
}

/// Noise SD of `ln I` per pixel: the 4-neighbour Laplacian of white noise
/// has variance 20σ², and its median absolute value is robust to the
/// vessels and the slow shading.
fn noise_sd(l: &[f64], w: usize, h: usize) -> f64 {
    let mut v: Vec<f64> = Vec::with_capacity(w * h);
    for y in 1..h.saturating_sub(1) {
        for x in 1..w.saturating_sub(1) {
            let i = y * w + x;
            v.push((4.0 * l[i] - l[i - 1] - l[i + 1] - l[i - w] - l[i + w]).abs());
        }
    }
    if v.is_empty() {
        return 0.0;
    }
    let k = v.len() / 2;
    let med = *v.select_nth_unstable_by(k, f64::total_cmp).1;
    1.4826 * med / 20f64.sqrt()
}

/// The scales for the settings' diameters, geometric.
fn scales(s: &DetectSettings) -> Vec<f64> {
    let lo = (SIGMA_PER_DIAMETER * s.min_diameter_px).max(0.8);
    let hi = (SIGMA_PER_DIAMETER * s.max_diameter_px).max(lo);
    (0..SCALES)
        .map(|i| lo * (hi / lo).powf(i as f64 / (SCALES - 1) as f64))
        .collect()
}

/// The multiscale vesselness of a band (dark vessels on a brighter fundus).
pub fn line_response(img: &[f32], w: usize, h: usize, s: &DetectSettings) -> LineResponse {
    let floor = img
        .iter()
        .copied()
        .filter(|v| *v > 0.0)
        .fold(f32::INFINITY, f32::min)
        .clamp(1e-6, 1.0) as f64;
    let l: Vec<f64> = img.iter().map(|v| (*v as f64).max(floor).ln()).collect();
    let noise = noise_sd(&l, w, h);
    let mut strength = vec![0f32; w * h];
    let mut best = vec![0f64; w * h];
    let mut normal = vec![[0f32; 2]; w * h];
    let mut sigma = vec![0f32; w * h];
    for sg in scales(s) {
        let [g, d1, d2] = kernels(sg);
        let norm = sg * sg;
        let lxx = convolve(&convolve(&l, w, h, &g, false), w, h, &d2, true);
        let lyy = convolve(&convolve(&l, w, h, &d2, false), w, h, &g, true);
        let lxy = convolve(&convolve(&l, w, h, &d1, false), w, h, &d1, true);
        // The response's noise at this scale: that of σ²·Lxx.
        let sq = |k: &[f64]| k.iter().map(|v| v * v).sum::<f64>();
        let sd = noise * norm * (sq(&d2) * sq(&g)).sqrt();
        let high = (RESPONSE_PER_DEPTH * -(1.0 - s.min_contrast).ln()).max(NOISE_SDS * sd);
        for i in 0..w * h {
            let (a, b, c) = (lxx[i] * norm, lxy[i] * norm, lyy[i] * norm);
            let m = 0.5 * (a + c);
            let q = (0.25 * (a - c) * (a - c) + b * b).sqrt();
            let (big, small) = (m + q, m - q);
            if big <= 0.0 {
                continue;
            }
            // A line has one large curvature and one near zero; a blob
            // (or the rounded end of a vessel) has two.
            let ratio = small / big;
            let v = big * (-(ratio * ratio) / (2.0 * 0.5 * 0.5)).exp();
            if v > best[i] {
                best[i] = v;
                strength[i] = (v / high) as f32;
                // The eigenvector of the large eigenvalue: across the vessel.
                let (nx, ny) = if (big - a).abs() + b.abs() > (big - c).abs() + b.abs() {
                    (b, big - a)
                } else {
                    (big - c, b)
                };
                let len = (nx * nx + ny * ny).sqrt();
                normal[i] = if len > 0.0 {
                    [(nx / len) as f32, (ny / len) as f32]
                } else {
                    [1.0, 0.0]
                };
                sigma[i] = sg as f32;
            }
        }
    }
    LineResponse {
        width: w,
        height: h,
        strength,
        normal,
        sigma,
        noise,
    }
}

/// The 8 neighbours of pixel `i` inside the image.
fn neighbours(i: usize, w: usize, h: usize) -> impl Iterator<Item = usize> {
    let (x, y) = ((i % w) as isize, (i / w) as isize);
    // 4-neighbours first, so that a walk along a thin line prefers them.
    const OFFSETS: [(isize, isize); 8] = [
        (1, 0),
        (0, 1),
        (-1, 0),
        (0, -1),
        (1, 1),
        (-1, 1),
        (-1, -1),
        (1, -1),
    ];
    OFFSETS.into_iter().filter_map(move |(dx, dy)| {
        let (nx, ny) = (x + dx, y + dy);
        (nx >= 0 && ny >= 0 && nx < w as isize && ny < h as isize)
            .then(|| ny as usize * w + nx as usize)
    })
}

/// Zhang & Suen (1984) thinning of a binary mask to one-pixel lines.
fn thin(mask: &mut [bool], w: usize, h: usize) {
    let at = |m: &[bool], x: isize, y: isize| -> u8 {
        (x >= 0 && y >= 0 && x < w as isize && y < h as isize && m[y as usize * w + x as usize])
            as u8
    };
    loop {
        let mut changed = false;
        for pass in 0..2 {
            let mut remove = Vec::new();
            for y in 0..h as isize {
                for x in 0..w as isize {
                    if !mask[y as usize * w + x as usize] {
                        continue;
                    }
                    // P2..P9 clockwise from north.
                    let p = [
                        at(mask, x, y - 1),
                        at(mask, x + 1, y - 1),
                        at(mask, x + 1, y),
                        at(mask, x + 1, y + 1),
                        at(mask, x, y + 1),
                        at(mask, x - 1, y + 1),
                        at(mask, x - 1, y),
                        at(mask, x - 1, y - 1),
                    ];
                    let b: u8 = p.iter().sum();
                    let a = (0..8).filter(|k| p[*k] == 0 && p[(k + 1) % 8] == 1).count();
                    let (c1, c2) = if pass == 0 {
                        (p[0] * p[2] * p[4], p[2] * p[4] * p[6])
                    } else {
                        (p[0] * p[2] * p[6], p[0] * p[4] * p[6])
                    };
                    if (2..=6).contains(&b) && a == 1 && c1 == 0 && c2 == 0 {
                        remove.push(y as usize * w + x as usize);
                    }
                }
            }
            changed |= !remove.is_empty();
            for i in remove {
                mask[i] = false;
            }
        }
        if !changed {
            break;
        }
    }
    unstair(mask, w, h);
}

/// Removes the corner pixels that Zhang–Suen leaves on diagonal
/// staircases: a pixel with two on 4-neighbours at a right angle whose
/// on-neighbours stay one connected piece without it. Otherwise every
/// step of a diagonal line would look like a branch point.
fn unstair(mask: &mut [bool], w: usize, h: usize) {
    // The ring in order N, NE, E, SE, S, SW, W, NW.
    const RING: [(isize, isize); 8] = [
        (0, -1),
        (1, -1),
        (1, 0),
        (1, 1),
        (0, 1),
        (-1, 1),
        (-1, 0),
        (-1, -1),
    ];
    loop {
        let mut changed = false;
        for y in 0..h as isize {
            for x in 0..w as isize {
                if !mask[y as usize * w + x as usize] {
                    continue;
                }
                let on: Vec<bool> = RING
                    .iter()
                    .map(|(dx, dy)| {
                        let (nx, ny) = (x + dx, y + dy);
                        nx >= 0
                            && ny >= 0
                            && nx < w as isize
                            && ny < h as isize
                            && mask[ny as usize * w + nx as usize]
                    })
                    .collect();
                let count = on.iter().filter(|v| **v).count();
                let corner = (on[0] || on[4]) && (on[2] || on[6]);
                if count < 2 || !corner || ring_pieces(&on, &RING) != 1 {
                    continue;
                }
                mask[y as usize * w + x as usize] = false;
                changed = true;
            }
        }
        if !changed {
            break;
        }
    }
}

/// How many 8-connected pieces the on-pixels of a pixel's ring make,
/// without the pixel itself.
fn ring_pieces(on: &[bool], ring: &[(isize, isize); 8]) -> usize {
    let mut seen = [false; 8];
    let mut pieces = 0;
    for s in 0..8 {
        if !on[s] || seen[s] {
            continue;
        }
        pieces += 1;
        let mut stack = vec![s];
        seen[s] = true;
        while let Some(a) = stack.pop() {
            for b in 0..8 {
                let near = (ring[a].0 - ring[b].0).abs() <= 1 && (ring[a].1 - ring[b].1).abs() <= 1;
                if on[b] && !seen[b] && near {
                    seen[b] = true;
                    stack.push(b);
                }
            }
        }
    }
    pieces
}

/// Centre-line pixels: the vessel region (strength at least the low
/// threshold, in 8-connected pieces that reach full strength somewhere:
/// hysteresis) thinned to its medial axis. The region, not the ridge of
/// the response, because a wide vessel with a flat floor answers best at
/// scales smaller than itself, near its two edges: its ridges come in
/// pairs, its medial axis does not.
fn axis(map: &LineResponse) -> Vec<bool> {
    let (w, h) = (map.width, map.height);
    let region: Vec<bool> = map
        .strength
        .iter()
        .map(|v| *v as f64 >= LOW_SHARE)
        .collect();
    let mut keep = vec![false; w * h];
    let mut seen = vec![false; w * h];
    for start in 0..w * h {
        if !region[start] || seen[start] {
            continue;
        }
        let mut stack = vec![start];
        let mut comp = Vec::new();
        seen[start] = true;
        while let Some(i) = stack.pop() {
            comp.push(i);
            for j in neighbours(i, w, h) {
                if region[j] && !seen[j] {
                    seen[j] = true;
                    stack.push(j);
                }
            }
        }
        if comp.iter().any(|i| map.strength[*i] >= 1.0) {
            for i in comp {
                keep[i] = true;
            }
        }
    }
    thin(&mut keep, w, h);
    keep
}

/// Pixels of a centre line in walking order, from an end.
fn walk(start: usize, on: &[bool], used: &mut [bool], w: usize, h: usize) -> Vec<usize> {
    let mut path = vec![start];
    used[start] = true;
    let mut cur = start;
    while let Some(next) = neighbours(cur, w, h).find(|j| on[*j] && !used[*j]) {
        used[next] = true;
        path.push(next);
        cur = next;
    }
    path
}

fn count_neighbours(i: usize, on: &[bool], w: usize, h: usize) -> usize {
    neighbours(i, w, h).filter(|j| on[*j]).count()
}

/// Removes side branches shorter than `max_len` pixels that end freely:
/// thinning leaves such spurs on wide vessels.
fn prune(on: &mut [bool], w: usize, h: usize, max_len: usize) {
    for _ in 0..2 {
        let ends: Vec<usize> = (0..w * h)
            .filter(|i| on[*i] && count_neighbours(*i, on, w, h) == 1)
            .collect();
        for e in ends {
            if !on[e] {
                continue;
            }
            let mut path = vec![e];
            let mut prev = usize::MAX;
            let mut cur = e;
            let mut reached_junction = false;
            while path.len() <= max_len {
                let next: Vec<usize> = neighbours(cur, w, h)
                    .filter(|j| on[*j] && *j != prev && !path.contains(j))
                    .collect();
                if next.len() != 1 {
                    reached_junction = next.len() > 1;
                    break;
                }
                if count_neighbours(next[0], on, w, h) > 2 {
                    reached_junction = true;
                    break;
                }
                prev = cur;
                cur = next[0];
                path.push(cur);
            }
            if reached_junction && path.len() <= max_len {
                for i in path {
                    on[i] = false;
                }
            }
        }
    }
}

/// A centre line as proposed: sub-pixel points in walking order and the
/// diameter its scales stand for.
#[derive(Debug, Clone, PartialEq)]
pub struct Centreline {
    pub points: Vec<(f64, f64)>,
    pub diameter_px: f64,
    pub length_px: f64,
}

/// Centre lines of the vessels in `map`, split at branch points and
/// crossings, each at least the settings' length, in a stable order (by
/// their first pixel).
pub fn centre_lines(map: &LineResponse, s: &DetectSettings) -> Vec<Centreline> {
    let (w, h) = (map.width, map.height);
    let mut on = axis(map);
    prune(&mut on, w, h, s.max_diameter_px.ceil() as usize);
    // Split at junctions: a junction and the pixels within the local
    // radius of it belong to no segment, as a profile there would cross
    // two vessels.
    let junctions: Vec<usize> = (0..w * h)
        .filter(|i| on[*i] && count_neighbours(*i, &on, w, h) > 2)
        .collect();
    for &j in &junctions {
        let r = (0.5 * map.diameter_px(j) + 1.0).ceil() as isize;
        let (jx, jy) = ((j % w) as isize, (j / w) as isize);
        for dy in -r..=r {
            for dx in -r..=r {
                let (x, y) = (jx + dx, jy + dy);
                if x >= 0
                    && y >= 0
                    && x < w as isize
                    && y < h as isize
                    && dx * dx + dy * dy <= r * r
                {
                    on[y as usize * w + x as usize] = false;
                }
            }
        }
    }
    let mut used = vec![false; w * h];
    let mut out = Vec::new();
    // Ends first, so that a line is walked from one end to the other;
    // then whatever is left (closed loops).
    let ends: Vec<usize> = (0..w * h)
        .filter(|i| on[*i] && count_neighbours(*i, &on, w, h) <= 1)
        .collect();
    let rest: Vec<usize> = (0..w * h).filter(|i| on[*i]).collect();
    for start in ends.into_iter().chain(rest) {
        if used[start] {
            continue;
        }
        let path = walk(start, &on, &mut used, w, h);
        for piece in split_at_turns(&path, w, s.min_diameter_px.max(4.0) as usize) {
            if let Some(c) = polyline(map, piece) {
                if c.length_px >= s.min_length_px
                    && c.diameter_px >= s.min_diameter_px
                    && c.diameter_px <= s.max_diameter_px
                {
                    out.push(c);
                }
            }
        }
    }
    out
}

/// The largest turn a vessel makes over a few of its own diameters; a
/// sharper one is where two vessels that touch (at a crossing, or side by
/// side at the disc) joined into one region.
const MAX_TURN_DEG: f64 = 40.0;

/// A walked path cut where it turns by more than [`MAX_TURN_DEG`] between
/// the `m` pixels before a point and the `m` after it; `m` pixels either
/// side of the sharpest point of each turn are left out.
fn split_at_turns(path: &[usize], w: usize, m: usize) -> Vec<&[usize]> {
    let n = path.len();
    if n < 2 * m + 1 {
        return vec![path];
    }
    let xy = |k: usize| ((path[k] % w) as f64, (path[k] / w) as f64);
    let turn = |k: usize| {
        let (a, b, c) = (xy(k - m), xy(k), xy(k + m));
        let (u, v) = ((b.0 - a.0, b.1 - a.1), (c.0 - b.0, c.1 - b.1));
        let cos = (u.0 * v.0 + u.1 * v.1)
            / ((u.0 * u.0 + u.1 * u.1).sqrt() * (v.0 * v.0 + v.1 * v.1).sqrt()).max(1e-12);
        cos.clamp(-1.0, 1.0).acos().to_degrees()
    };
    let angles: Vec<f64> = (m..n - m).map(turn).collect();
    let mut cuts = Vec::new();
    let mut k = 0;
    while k < angles.len() {
        if angles[k] > MAX_TURN_DEG {
            // The sharpest point of this run of large turns.
            let mut end = k;
            while end + 1 < angles.len() && angles[end + 1] > MAX_TURN_DEG {
                end += 1;
            }
            let best = (k..=end)
                .max_by(|a, b| angles[*a].total_cmp(&angles[*b]))
                .expect("a run");
            cuts.push(best + m);
            k = end + 1;
        } else {
            k += 1;
        }
    }
    let mut pieces = Vec::new();
    let mut from = 0;
    for c in cuts {
        let to = c.saturating_sub(m);
        if to > from {
            pieces.push(&path[from..to]);
        }
        from = (c + m).min(n);
    }
    if from < n {
        pieces.push(&path[from..]);
    }
    pieces
}

/// Points along a walked path of axis pixels, smoothed along the line
/// (a moving average of ±3 pixels, shorter at the ends) and thinned to
/// the fewest points within 0.2 px. The axis is good to about a pixel;
/// the profiles across it then find the centre to a fraction of one
/// ([`refine`]).
fn polyline(map: &LineResponse, path: &[usize]) -> Option<Centreline> {
    if path.len() < 3 {
        return None;
    }
    let w = map.width;
    let raw: Vec<(f64, f64)> = path
        .iter()
        .map(|&i| ((i % w) as f64, (i / w) as f64))
        .collect();
    let smooth = moving_average(&raw, 3);
    let mut diam: Vec<f64> = path.iter().map(|&i| map.diameter_px(i)).collect();
    let mid = diam.len() / 2;
    let diameter_px = *diam.select_nth_unstable_by(mid, f64::total_cmp).1;
    let length_px = length(&smooth);
    Some(Centreline {
        points: simplify(&smooth, 0.2),
        diameter_px,
        length_px,
    })
}

fn moving_average(p: &[(f64, f64)], half: usize) -> Vec<(f64, f64)> {
    let n = p.len();
    (0..n)
        .map(|k| {
            let hw = half.min(k).min(n - 1 - k);
            let part = &p[k - hw..=k + hw];
            let m = part.len() as f64;
            (
                part.iter().map(|q| q.0).sum::<f64>() / m,
                part.iter().map(|q| q.1).sum::<f64>() / m,
            )
        })
        .collect()
}

/// The length of a polyline, px.
pub fn length(l: &[(f64, f64)]) -> f64 {
    l.windows(2)
        .map(|p| ((p[1].0 - p[0].0).powi(2) + (p[1].1 - p[0].1).powi(2)).sqrt())
        .sum()
}

/// A traced line moved onto the vessel's centre as the profiles across
/// it find it: the fitted centres of the positions whose fit is usable
/// (no flag), smoothed over ±2 positions, ends that bend away from the
/// vessel's course dropped ([`unhook`]), then each end carried on,
/// straight, as far as the vessel goes ([`extend`]). `None` with fewer
/// than three usable positions.
pub fn refine(
    img: &super::ingest::Multiband,
    line: &[(f64, f64)],
    others: &[super::profile::Neighbour],
    band: usize,
    st: &super::profile::ProfileSettings,
) -> Option<Vec<(f64, f64)>> {
    use super::profile::{analyse_segment, median};
    let prof = analyse_segment(img, line, others, band, st);
    // Only clean positions: beside a neighbour the background, and with
    // it the fitted centre, is pulled towards the neighbour.
    let good: Vec<_> = prof.iter().filter(|p| p.flags.is_empty()).collect();
    if good.len() < 3 {
        return None;
    }
    let mut out = moving_average(&good.iter().map(|p| (p.x, p.y)).collect::<Vec<_>>(), 2);
    unhook(&mut out);
    out.reverse();
    unhook(&mut out);
    out.reverse();
    // The profiles stop short of the traced line's ends, and the traced
    // axis short of the vessel's (its rounded end answers weakly, and
    // beside a neighbour it bends towards it): each end is carried on,
    // straight, as far as the vessel goes.
    let radius = median(good.iter().map(|p| 0.5 * p.diameter_px).collect());
    let depth = median(good.iter().map(|p| 1.0 - p.transmission[band]).collect());
    let img_band = &img.bands[band];
    let (w, h) = (img.width, img.height);
    if out.len() >= 2 {
        let n = out.len();
        let (first, last) = (
            good[0].background[band],
            good[good.len() - 1].background[band],
        );
        let tail = extend(
            img_band,
            w,
            h,
            (out[n - 1], out[n.saturating_sub(4).min(n - 2)]),
            radius,
            depth,
            last,
        );
        let head = extend(
            img_band,
            w,
            h,
            (out[0], out[3.min(n - 1)]),
            radius,
            depth,
            first,
        );
        if let Some(t) = tail {
            out.push(t);
        }
        if let Some(hd) = head {
            out.insert(0, hd);
        }
    }
    Some(simplify(&out, 0.1))
}

/// The most a centre line may turn between its first three steps and the
/// next four (profiles 2 px apart); more is a vessel end bent towards a
/// neighbour it touches, not the vessel's course.
const MAX_END_TURN_DEG: f64 = 15.0;

/// Drops points from the start of a line while it turns by more than
/// [`MAX_END_TURN_DEG`] there.
fn unhook(p: &mut Vec<(f64, f64)>) {
    let dir = |a: (f64, f64), b: (f64, f64)| (b.1 - a.1).atan2(b.0 - a.0);
    while p.len() >= 8 {
        let turn = (dir(p[0], p[3]) - dir(p[3], p[7]) + std::f64::consts::PI)
            .rem_euclid(2.0 * std::f64::consts::PI)
            - std::f64::consts::PI;
        if turn.abs().to_degrees() <= MAX_END_TURN_DEG {
            break;
        }
        p.remove(0);
    }
}

/// How far a vessel goes on beyond `end`, away from `from`: stepping a
/// pixel at a time while the centre stays at least half the vessel's
/// `depth` (1 − T) below `background`, the fundus beside the vessel at its
/// last usable profile (the fundus changes slowly; a neighbour that comes
/// close does not stop the line, which the profiles' `near-segment` flag
/// then handles as for drawn segments). The end is put half a radius back,
/// as the last steps are in the vessel's rounded end, not on its axis.
/// `None` when the vessel does not go on.
fn extend(
    band: &[f32],
    w: usize,
    h: usize,
    (end, from): ((f64, f64), (f64, f64)),
    radius: f64,
    depth: f64,
    background: f64,
) -> Option<(f64, f64)> {
    use super::register::bilinear;
    let (dx, dy) = (end.0 - from.0, end.1 - from.1);
    let len = (dx * dx + dy * dy).sqrt();
    if !(len > 0.0 && radius > 0.0 && depth > 0.0 && background > 0.0) {
        return None;
    }
    let (ux, uy) = (dx / len, dy / len);
    let mut reached = 0.0;
    for step in 1..=(4.0 * radius).ceil() as usize {
        let t = step as f64;
        let Some(c) = bilinear(band, w, h, end.0 + t * ux, end.1 + t * uy) else {
            break;
        };
        if (background - c) / background < 0.5 * depth {
            break;
        }
        reached = t;
    }
    let t = reached - 0.5 * radius;
    (t >= 1.0).then_some((end.0 + t * ux, end.1 + t * uy))
}

/// Douglas–Peucker: the fewest points that keep the line within `tol` px.
fn simplify(p: &[(f64, f64)], tol: f64) -> Vec<(f64, f64)> {
    fn keep(p: &[(f64, f64)], a: usize, b: usize, tol: f64, out: &mut Vec<bool>) {
        let (x0, y0) = p[a];
        let (x1, y1) = p[b];
        let (dx, dy) = (x1 - x0, y1 - y0);
        let len = (dx * dx + dy * dy).sqrt().max(1e-12);
        let (mut far, mut at) = (0.0, a);
        for (k, q) in p.iter().enumerate().take(b).skip(a + 1) {
            let d = ((q.0 - x0) * dy - (q.1 - y0) * dx).abs() / len;
            if d > far {
                far = d;
                at = k;
            }
        }
        if far > tol {
            out[at] = true;
            keep(p, a, at, tol, out);
            keep(p, at, b, tol, out);
        }
    }
    let mut k = vec![false; p.len()];
    k[0] = true;
    k[p.len() - 1] = true;
    keep(p, 0, p.len() - 1, tol, &mut k);
    p.iter()
        .zip(k)
        .filter(|(_, k)| *k)
        .map(|(q, _)| *q)
        .collect()
}

/// How much vessel a band shows: the share of pixels at full strength,
/// at one middle scale, for choosing the band to trace in.
pub fn vessel_contrast(img: &[f32], w: usize, h: usize, s: &DetectSettings) -> f64 {
    let mid = DetectSettings {
        min_diameter_px: 0.5 * (s.min_diameter_px + s.max_diameter_px),
        max_diameter_px: 0.5 * (s.min_diameter_px + s.max_diameter_px),
        ..*s
    };
    let map = line_response(img, w, h, &mid);
    let mut v: Vec<f32> = map.strength.clone();
    // The strength at the 98th percentile: vessels cover a few per cent
    // of a fundus field.
    let k = ((v.len() as f64) * 0.98) as usize;
    let k = k.min(v.len().saturating_sub(1));
    *v.select_nth_unstable_by(k, f32::total_cmp).1 as f64
}

#[cfg(test)]
mod tests {
    use super::*;

    fn settings() -> DetectSettings {
        DetectSettings {
            min_diameter_px: 3.0,
            max_diameter_px: 16.0,
            min_length_px: 20.0,
            min_contrast: 0.03,
        }
    }

    /// A straight dark bar of `depth` (in 1 − T) and diameter `d` px on a
    /// flat field of 1000, at angle `a` through the centre.
    fn bar(w: usize, h: usize, d: f64, depth: f64, a: f64) -> Vec<f32> {
        let (c, s) = (a.cos(), a.sin());
        let (cx, cy) = (w as f64 / 2.0, h as f64 / 2.0);
        let mut img = vec![1000f32; w * h];
        for y in 0..h {
            for x in 0..w {
                let (u, v) = (x as f64 - cx, y as f64 - cy);
                let across = -u * s + v * c;
                let along = u * c + v * s;
                let r = d / 2.0;
                if across.abs() < r && along.abs() < 0.35 * w as f64 {
                    let chord = (1.0 - (across / r).powi(2)).sqrt();
                    img[y * w + x] = (1000.0 * (1.0 - depth * chord)) as f32;
                }
            }
        }
        img
    }

    #[test]
    fn a_straight_vessel_gives_one_centre_line_on_its_axis() {
        for a in [0.0, 0.5, 1.2] {
            let img = bar(128, 128, 9.0, 0.3, a);
            let map = line_response(&img, 128, 128, &settings());
            let lines = centre_lines(&map, &settings());
            assert_eq!(lines.len(), 1, "angle {a}: {lines:?}");
            let (c, s) = (f64::cos(a), f64::sin(a));
            let across = |p: &(f64, f64)| -(p.0 - 64.0) * s + (p.1 - 64.0) * c;
            for p in &lines[0].points {
                assert!(
                    across(p).abs() < 1.0,
                    "angle {a}: {p:?} is {} px off",
                    across(p)
                );
            }
            // The profiles across the traced axis put it on the centre
            // (within 0.4 px on this bar, whose edges are whole pixels);
            // the ends carried on beyond the last profile stay within
            // half a pixel.
            let mb = super::super::ingest::Multiband {
                width: 128,
                height: 128,
                bands: vec![img.clone()],
                bit_depth: 16,
            };
            let st = super::super::profile::ProfileSettings::default();
            let fine = refine(&mb, &lines[0].points, &[], 0, &st).expect("refined");
            let n = fine.len();
            for p in &fine[1..n - 1] {
                assert!(
                    across(p).abs() < 0.4,
                    "angle {a}: {p:?} is {} px off",
                    across(p)
                );
            }
            for p in &fine {
                assert!(
                    across(p).abs() < 0.5,
                    "angle {a}: {p:?} is {} px off",
                    across(p)
                );
            }
            assert!(lines[0].length_px > 60.0, "{}", lines[0].length_px);
            let d = lines[0].diameter_px;
            assert!((6.0..13.0).contains(&d), "diameter {d}");
        }
    }

    #[test]
    fn a_flat_noisy_field_gives_nothing() {
        use rand::SeedableRng;
        use rand_distr::{Distribution, Normal};
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(3);
        let n = Normal::new(0.0, 15.0).unwrap();
        let img: Vec<f32> = (0..128 * 128)
            .map(|i| 1000.0 + 60.0 * ((i % 128) as f32 * 0.03).sin() + n.sample(&mut rng) as f32)
            .collect();
        let map = line_response(&img, 128, 128, &settings());
        assert!((map.noise - 0.015).abs() < 0.002, "noise {}", map.noise);
        assert!(centre_lines(&map, &settings()).is_empty());
    }

    #[test]
    fn a_faint_vessel_below_the_contrast_floor_is_not_proposed() {
        let img = bar(128, 128, 9.0, 0.01, 0.3);
        let map = line_response(&img, 128, 128, &settings());
        assert!(centre_lines(&map, &settings()).is_empty());
    }

    #[test]
    fn a_path_is_cut_where_it_turns_sharply() {
        let w = 100;
        // Right along y = 50 for 30 px, then back up and left at 60°.
        let mut path: Vec<usize> = (10..40).map(|x| 50 * w + x).collect();
        for k in 1..30 {
            let (x, y) = (40.0 - 0.5 * k as f64, 50.0 - 0.866 * k as f64);
            path.push(y.round() as usize * w + x.round() as usize);
        }
        let pieces = split_at_turns(&path, w, 5);
        assert_eq!(pieces.len(), 2, "{pieces:?}");
        // A gentle bend is kept whole.
        let arc: Vec<usize> = (0..60)
            .map(|k| {
                let a = k as f64 / 60.0 * 0.5;
                let (x, y) = (10.0 + 60.0 * a.sin(), 80.0 - 60.0 * (1.0 - a.cos()));
                y.round() as usize * w + x.round() as usize
            })
            .collect();
        assert_eq!(split_at_turns(&arc, w, 5).len(), 1);
    }

    #[test]
    fn thinning_leaves_one_pixel_lines() {
        let (w, h) = (20, 9);
        let mut m = vec![false; w * h];
        for y in 3..6 {
            for x in 2..18 {
                m[y * w + x] = true;
            }
        }
        thin(&mut m, w, h);
        for x in 4..16 {
            let n = (0..h).filter(|y| m[y * w + x]).count();
            assert_eq!(n, 1, "column {x}");
        }
    }

    #[test]
    fn simplify_keeps_corners_and_drops_collinear_points() {
        let p: Vec<(f64, f64)> = (0..=10)
            .map(|i| (i as f64, 0.0))
            .chain((1..=10).map(|i| (10.0, i as f64)))
            .collect();
        assert_eq!(
            simplify(&p, 0.1),
            vec![(0.0, 0.0), (10.0, 0.0), (10.0, 10.0)]
        );
    }
}
