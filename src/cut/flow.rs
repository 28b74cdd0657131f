//! Maximum flow / minimum s–t cut by Dinic's algorithm over a compact adjacency array.
//! Knows nothing about ONNX: vertices are numbers, capacities are integers.

/// A capacity that no finite cut can pay: used for "must not be cut" edges.
pub const INF: u64 = u64::MAX / 4;

#[derive(Clone, Debug, Default)]
pub struct Network {
    n: usize,
    edges: Vec<(u32, u32, u64)>,
}

impl Network {
    pub fn new(n: usize) -> Network {
        Network { n, edges: Vec::new() }
    }

    pub fn add_vertex(&mut self) -> usize {
        self.n += 1;
        self.n - 1
    }

    pub fn vertices(&self) -> usize {
        self.n
    }

    /// A directed edge; zero-capacity edges are dropped.
    pub fn add_edge(&mut self, from: usize, to: usize, capacity: u64) {
        if capacity > 0 && from != to {
            self.edges.push((from as u32, to as u32, capacity.min(INF)));
        }
    }

    pub fn edges(&self) -> &[(u32, u32, u64)] {
        &self.edges
    }
}

/// The result: the flow value (= the cut's capacity) and which vertices stay on the source
/// side of a minimum cut (those reachable from `s` in the residual network).
#[derive(Clone, Debug)]
pub struct MinCut {
    pub value: u64,
    pub source_side: Vec<bool>,
}

/// Residual graph in CSR form: for every edge, its reverse is `e ^ 1`.
struct Residual {
    start: Vec<usize>,
    to: Vec<u32>,
    cap: Vec<u64>,
    // position in CSR order of each arc, by arc id
    order: Vec<usize>,
}

fn build(net: &Network) -> Residual {
    let n = net.n;
    let m = net.edges.len() * 2;
    let mut deg = vec![0usize; n + 1];
    for &(u, v, _) in &net.edges {
        deg[u as usize] += 1;
        deg[v as usize] += 1;
    }
    let mut start = vec![0usize; n + 1];
    for i in 0..n {
        start[i + 1] = start[i] + deg[i];
    }
    let mut fill = start.clone();
    let mut to = vec![0u32; m];
    let mut cap = vec![0u64; m];
    let mut order = vec![0usize; m];
    for (k, &(u, v, c)) in net.edges.iter().enumerate() {
        let (a, b) = (2 * k, 2 * k + 1);
        let pa = fill[u as usize];
        fill[u as usize] += 1;
        let pb = fill[v as usize];
        fill[v as usize] += 1;
        to[pa] = v;
        cap[pa] = c;
        to[pb] = u;
        cap[pb] = 0;
        order[a] = pa;
        order[b] = pb;
    }
    Residual { start, to, cap, order }
}

/// Minimum s–t cut of `net`.
pub fn min_cut(net: &Network, s: usize, t: usize) -> MinCut {
    let n = net.n;
    let mut r = build(net);
    // Reverse arc of the arc at CSR position p.
    let mut rev = vec![0usize; r.to.len()];
    for k in 0..net.edges.len() {
        let (pa, pb) = (r.order[2 * k], r.order[2 * k + 1]);
        rev[pa] = pb;
        rev[pb] = pa;
    }
    let mut flow: u64 = 0;
    let mut level = vec![u32::MAX; n];
    let mut it = vec![0usize; n];
    let mut queue = Vec::with_capacity(n);
    loop {
        // BFS levels.
        level.iter_mut().for_each(|l| *l = u32::MAX);
        level[s] = 0;
        queue.clear();
        queue.push(s);
        let mut head = 0;
        while head < queue.len() {
            let u = queue[head];
            head += 1;
            for p in r.start[u]..r.start[u + 1] {
                let v = r.to[p] as usize;
                if r.cap[p] > 0 && level[v] == u32::MAX {
                    level[v] = level[u] + 1;
                    queue.push(v);
                }
            }
        }
        if level[t] == u32::MAX {
            break;
        }
        it.copy_from_slice(&r.start[..n]);
        // Blocking flow by iterative DFS (no recursion: deep networks must not overflow).
        loop {
            let pushed = augment(&mut r, &rev, &level, &mut it, s, t);
            if pushed == 0 {
                break;
            }
            flow = flow.saturating_add(pushed);
        }
    }
    let mut seen = vec![false; n];
    seen[s] = true;
    let mut stack = vec![s];
    while let Some(u) = stack.pop() {
        for p in r.start[u]..r.start[u + 1] {
            let v = r.to[p] as usize;
            if r.cap[p] > 0 && !seen[v] {
                seen[v] = true;
                stack.push(v);
            }
        }
    }
    MinCut {
        value: flow,
        source_side: seen,
    }
}

/// One augmenting path along the level graph; returns the amount pushed.
fn augment(r: &mut Residual, rev: &[usize], level: &[u32], it: &mut [usize], s: usize, t: usize) -> u64 {
    let mut path: Vec<usize> = Vec::new(); // arc positions
    let mut u = s;
    loop {
        if u == t {
            let f = path.iter().map(|&p| r.cap[p]).min().unwrap_or(0);
            for &p in &path {
                r.cap[p] -= f;
                r.cap[rev[p]] = r.cap[rev[p]].saturating_add(f);
            }
            return f;
        }
        let mut advanced = false;
        while it[u] < r.start[u + 1] {
            let p = it[u];
            let v = r.to[p] as usize;
            if r.cap[p] > 0 && level[v] == level[u].wrapping_add(1) {
                path.push(p);
                u = v;
                advanced = true;
                break;
            }
            it[u] += 1;
        }
        if !advanced {
            // Dead end: retreat one arc and skip it.
            level_dead_end(it, u, r);
            match path.pop() {
                None => return 0,
                Some(p) => {
                    let from = r.to[rev[p]] as usize;
                    it[from] += 1;
                    u = from;
                }
            }
        }
    }
}

fn level_dead_end(it: &mut [usize], u: usize, r: &Residual) {
    it[u] = r.start[u + 1];
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn textbook_network() {
        // CLRS figure 26.1's flow network: maximum flow 23.
        let mut n = Network::new(6);
        for (u, v, c) in [
            (0, 1, 16),
            (0, 2, 13),
            (1, 3, 12),
            (2, 1, 4),
            (2, 4, 14),
            (3, 2, 9),
            (3, 5, 20),
            (4, 3, 7),
            (4, 5, 4),
        ] {
            n.add_edge(u, v, c);
        }
        let cut = min_cut(&n, 0, 5);
        assert_eq!(cut.value, 23);
        // The cut's capacity equals the flow.
        let cap: u64 = n
            .edges()
            .iter()
            .filter(|e| cut.source_side[e.0 as usize] && !cut.source_side[e.1 as usize])
            .map(|e| e.2)
            .fold(0, u64::saturating_add);
        assert_eq!(cap, 23);
    }
}
