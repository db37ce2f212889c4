//! Directed links and the route between every ordered pair of devices.

use baton_engine::SimDuration;

/// One directed link's properties.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub struct LinkSpec {
    /// Time for the first byte to cross the link.
    pub latency_ns: u64,
    /// How many bytes per second the link carries (must be positive);
    /// [`LinkSpec::UNLIMITED`] for a link that never limits a rate.
    pub bytes_per_s: u64,
}

impl LinkSpec {
    /// A bandwidth that never limits: transfers cost only latency.
    pub const UNLIMITED: u64 = u64::MAX;
}

/// Index of a directed link in a topology.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash, PartialOrd, Ord)]
pub struct LinkId(pub u32);

/// Directed links plus a route for every ordered pair of devices.
#[derive(Clone, Debug)]
pub struct Topology {
    devices: u32,
    /// The cluster device each topology device is (names and placement).
    cluster: Vec<u32>,
    pub(crate) links: Vec<LinkSpec>,
    names: Vec<String>,
    /// Routes of pair (a, b) are `route_links[route_start[a*n+b] .. route_start[a*n+b+1]]`.
    route_start: Vec<u32>,
    pub(crate) route_links: Vec<LinkId>,
    route_latency_ns: Vec<u64>,
}

impl Topology {
    /// Every ordered pair of distinct devices joined by its own directed link
    /// (so each unordered pair has one full-duplex link). A device sending to
    /// itself uses no link.
    pub fn full_mesh(devices: u32, spec: LinkSpec) -> Self {
        let ids: Vec<u32> = (0..devices).collect();
        Self::full_mesh_of(&ids, spec)
    }

    /// [`Topology::full_mesh`] over the devices `ids` (so topology device `i`
    /// is cluster device `ids[i]`, which names the links).
    pub fn full_mesh_of(ids: &[u32], spec: LinkSpec) -> Self {
        let devices = ids.len() as u32;
        let n = ids.len();
        let mut links = Vec::with_capacity(n * n.saturating_sub(1));
        let mut names = Vec::with_capacity(links.capacity());
        let mut route_start = Vec::with_capacity(n * n + 1);
        let mut route_links = Vec::with_capacity(links.capacity());
        let mut route_latency_ns = Vec::with_capacity(n * n);
        for a in 0..n {
            for b in 0..n {
                route_start.push(route_links.len() as u32);
                if a == b {
                    route_latency_ns.push(0);
                    continue;
                }
                let id = LinkId(links.len() as u32);
                links.push(spec);
                names.push(format!("dev{}->dev{}", ids[a], ids[b]));
                route_links.push(id);
                route_latency_ns.push(spec.latency_ns);
            }
        }
        route_start.push(route_links.len() as u32);
        Topology { devices, cluster: ids.to_vec(), links, names, route_start, route_links, route_latency_ns }
    }

    /// Boxes of devices: `nodes` nodes of `devices_per_node` devices each,
    /// numbered node-major. Each device has a full-duplex link to its node's
    /// switch (`device_link`); each node reaches the fabric through `cards`
    /// full-duplex links (`node_link`); the fabric itself never limits.
    ///
    /// Within a node a transfer goes device -> switch -> device (two links);
    /// across nodes device -> switch -> card -> fabric -> card -> switch ->
    /// device (four links). A device uses card `local index mod cards` of its
    /// node, on both the sending and the receiving side, so the devices of a
    /// node spread their cross-node traffic evenly over its cards.
    ///
    /// Routes are built among the devices `used` (topology device `i` is
    /// cluster device `used[i]`); links are named `dev3 up`, `dev3 down`,
    /// `node0-card1 up`, `node0-card1 down`.
    pub fn two_level(
        nodes: u32,
        devices_per_node: u32,
        device_link: LinkSpec,
        node_link: LinkSpec,
        cards: u32,
        used: &[u32],
    ) -> Self {
        let cards = cards.max(1);
        let mut links = Vec::new();
        let mut names = Vec::new();
        let mut add = |name: String, spec: LinkSpec| {
            links.push(spec);
            names.push(name);
            LinkId((links.len() - 1) as u32)
        };
        // Device links for the devices in use, then every node's cards.
        let dev: Vec<(LinkId, LinkId)> = used
            .iter()
            .map(|&d| (add(format!("dev{d} up"), device_link), add(format!("dev{d} down"), device_link)))
            .collect();
        let card: Vec<(LinkId, LinkId)> = (0..nodes * cards)
            .map(|k| {
                let (n, c) = (k / cards, k % cards);
                (add(format!("node{n}-card{c} up"), node_link), add(format!("node{n}-card{c} down"), node_link))
            })
            .collect();
        let dpn = devices_per_node.max(1);
        let routes: Vec<Vec<Vec<LinkId>>> = used
            .iter()
            .enumerate()
            .map(|(a, &da)| {
                used.iter()
                    .enumerate()
                    .map(|(b, &db)| {
                        let (na, nb) = (da / dpn, db / dpn);
                        if a == b || da == db {
                            vec![]
                        } else if na == nb {
                            vec![dev[a].0, dev[b].1]
                        } else {
                            let ca = card[(na * cards + (da % dpn) % cards) as usize].0;
                            let cb = card[(nb * cards + (db % dpn) % cards) as usize].1;
                            vec![dev[a].0, ca, cb, dev[b].1]
                        }
                    })
                    .collect()
            })
            .collect();
        let mut t = Self::from_routes(names.into_iter().zip(links).collect(), &routes);
        t.cluster = used.to_vec();
        t
    }

    /// A topology from explicit links and routes; `routes[a][b]` lists the
    /// links from device `a` to device `b` in order.
    pub fn from_routes(links: Vec<(String, LinkSpec)>, routes: &[Vec<Vec<LinkId>>]) -> Self {
        let n = routes.len();
        let (names, links): (Vec<_>, Vec<_>) = links.into_iter().unzip();
        let mut route_start = Vec::with_capacity(n * n + 1);
        let mut route_links = Vec::new();
        let mut route_latency_ns = Vec::with_capacity(n * n);
        for row in routes {
            for route in row {
                route_start.push(route_links.len() as u32);
                route_latency_ns.push(route.iter().map(|l| links[l.0 as usize].latency_ns).sum());
                route_links.extend_from_slice(route);
            }
        }
        route_start.push(route_links.len() as u32);
        Topology {
            devices: n as u32,
            cluster: (0..n as u32).collect(),
            links,
            names,
            route_start,
            route_links,
            route_latency_ns,
        }
    }

    /// Devices the routes join.
    pub fn devices(&self) -> u32 {
        self.devices
    }

    /// The cluster device that topology device `d` is: where it was placed.
    pub fn cluster_device(&self, d: u32) -> u32 {
        self.cluster.get(d as usize).copied().unwrap_or(d)
    }

    /// Directed links.
    pub fn link_count(&self) -> usize {
        self.links.len()
    }

    /// A link's latency and bandwidth.
    pub fn link(&self, id: LinkId) -> LinkSpec {
        self.links[id.0 as usize]
    }

    /// Replaces link `id`'s latency and bandwidth (every route through it
    /// takes the new latency).
    pub fn set_link(&mut self, id: LinkId, spec: LinkSpec) {
        self.links[id.0 as usize] = spec;
        let n = self.devices as usize;
        for pair in 0..n * n {
            let (a, b) = (self.route_start[pair] as usize, self.route_start[pair + 1] as usize);
            self.route_latency_ns[pair] =
                self.route_links[a..b].iter().map(|l| self.links[l.0 as usize].latency_ns).sum();
        }
    }

    /// The id of the link named `name`, if any.
    pub fn link_named(&self, name: &str) -> Option<LinkId> {
        self.names.iter().position(|n| n == name).map(|i| LinkId(i as u32))
    }

    /// A link's name, e.g. `dev0->dev1`, `node0-card1 up`.
    pub fn link_name(&self, id: LinkId) -> &str {
        &self.names[id.0 as usize]
    }

    fn pair(&self, src: u32, dst: u32) -> usize {
        src as usize * self.devices as usize + dst as usize
    }

    pub(crate) fn route_bounds(&self, src: u32, dst: u32) -> (u32, u32) {
        let p = self.pair(src, dst);
        (self.route_start[p], self.route_start[p + 1])
    }

    /// The links from `src` to `dst`, in order (empty when `src == dst`).
    pub fn route(&self, src: u32, dst: u32) -> &[LinkId] {
        let p = self.pair(src, dst);
        &self.route_links[self.route_start[p] as usize..self.route_start[p + 1] as usize]
    }

    /// Sum of the latencies along the route from `src` to `dst`.
    pub fn route_latency(&self, src: u32, dst: u32) -> SimDuration {
        SimDuration(self.route_latency_ns[self.pair(src, dst)])
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::network::tests::deliveries;

    #[test]
    fn two_level_routes_and_card_choice() {
        let dl = LinkSpec { latency_ns: 2_000, bytes_per_s: 150_000_000_000 };
        let nl = LinkSpec { latency_ns: 6_000, bytes_per_s: 25_000_000_000 };
        let used: Vec<u32> = (0..8).collect();
        let t = Topology::two_level(2, 4, dl, nl, 2, &used);
        let names = |a: u32, b: u32| t.route(a, b).iter().map(|&l| t.link_name(l).to_string()).collect::<Vec<_>>();
        assert_eq!(names(0, 1), vec!["dev0 up", "dev1 down"]);
        // Device 1 uses card 1 (1 mod 2); device 6 is node 1's local device 2: card 0.
        assert_eq!(names(1, 6), vec!["dev1 up", "node0-card1 up", "node1-card0 down", "dev6 down"]);
        assert_eq!(t.route_latency(1, 6), SimDuration(2 * 2_000 + 2 * 6_000));
        assert_eq!(t.route_latency(0, 1), SimDuration(4_000));
        assert!(t.route(3, 3).is_empty());
        // A cross-node transfer alone is limited by the card: 25 B/ns.
        let d = deliveries(t, &[(0, 1, 6, 2_500_000)]);
        assert_eq!(d, vec![100_000 + 16_000]);
    }
}
