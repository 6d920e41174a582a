//! Talking to a fleet: the replica a producer's batches go to, by the producer affinity rule
//! ([`crate::affinity`]), from `--server` given as several URLs or as a name that resolves to
//! every replica.
//!
//! Each replica says its name (and, when configured, its fleet's names) through the Identify
//! call. The producer's replica is the owner of its id over the fleet's names; the client
//! declares that set in every batch, so that a replica can refuse a misrouted one. When the
//! owner does not answer, the client waits for it (a restarted replica comes back with its
//! store and its producers' sequence marks), re-resolving the names each round, up to a
//! deadline; then it fails, or with failover goes to the next replica in the producer's order
//! of preference (and declares nothing: that replica has not seen the batches the owner
//! acknowledged, so a batch whose acknowledgement was lost can count twice).

use std::time::{Duration, Instant};

use super::{channel_to, ClientError, Conn};
use crate::affinity;
use crate::pb;

/// How long a producer waits for its replica to come back before it fails (or fails over).
pub const DEFAULT_REPLICA_WAIT: Duration = Duration::from_secs(120);
/// How long one Identify call may take.
pub const IDENTIFY_TIMEOUT: Duration = Duration::from_secs(3);
/// Pause between two rounds of resolving and identifying the replicas.
pub const ROUND_PAUSE: Duration = Duration::from_millis(500);

/// Where a producer sends, and what its batches declare.
#[derive(Debug, Clone)]
pub struct Route {
    /// The connection.
    pub conn: Conn,
    /// The URL it goes to.
    pub url: String,
    /// The replica's name (None: a lone server, no affinity).
    pub replica: Option<String>,
    /// The replica set the batches declare (empty: nothing declared).
    pub declared: Vec<String>,
}

/// How to reach a fleet: the `--server` value and the waiting rules.
#[derive(Debug, Clone)]
pub struct Fleet {
    urls: Vec<String>,
    /// How long to wait for a producer's replica.
    pub wait: Duration,
    /// Go to the next replica in preference order once `wait` has passed.
    pub failover: bool,
}

/// One address of the fleet: the URL to connect to, and the host name TLS checks the
/// certificate against when the URL was made from a resolved address.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Endpoint {
    /// The URL.
    pub url: String,
    /// The name TLS checks, when not the URL's host.
    pub tls_name: Option<String>,
}

impl Endpoint {
    /// A connection to it.
    pub fn connect(&self) -> Result<Conn, ClientError> {
        channel_to(&self.url, self.tls_name.as_deref())
    }
}

impl Fleet {
    /// From a `--server` value: one URL, or several separated by commas.
    pub fn parse(server: &str, wait: Duration, failover: bool) -> Result<Fleet, ClientError> {
        let urls: Vec<String> = server.split(',').map(str::trim).filter(|u| !u.is_empty()).map(str::to_owned).collect();
        if urls.is_empty() {
            return Err(ClientError::Setup(format!("--server {server:?}: no URL")));
        }
        for u in &urls {
            u.parse::<tonic::transport::Uri>().ok().filter(|x| x.host().is_some()).ok_or_else(|| ClientError::Setup(format!("--server {u}: not a URL with a host")))?;
        }
        Ok(Fleet { urls, wait, failover })
    }

    /// The URLs as given.
    pub fn urls(&self) -> &[String] {
        &self.urls
    }

    /// Where `producer` sends: with one URL whose host is one address, that server (as
    /// always); otherwise the producer's replica by the affinity rule, waited for as
    /// [`Fleet::wait`] says.
    pub async fn route(&self, producer: &str) -> Result<Route, ClientError> {
        let started = Instant::now();
        if let Some(e) = self.lone().await? {
            return Ok(Route { conn: e.connect()?, url: e.url.clone(), replica: None, declared: Vec::new() });
        }
        loop {
            let endpoints = self.endpoints().await?;
            let why = match self.choose(producer, &endpoints, started.elapsed() >= self.wait).await? {
                Ok(route) => return Ok(route),
                Err(why) => why,
            };
            if started.elapsed() >= self.wait {
                let advice = if self.failover { "" } else { "; re-run the same command once it is back (nothing is counted twice), or pass --failover to use the next replica (a batch may then count twice)" };
                return Err(ClientError::Setup(format!("{why}, for {:.0} s{advice}", self.wait.as_secs_f64())));
            }
            tokio::time::sleep(ROUND_PAUSE).await;
        }
    }

    /// One round: identify every endpoint and pick the producer's replica. Err(reason): the
    /// replica cannot be used yet (the outer Err is final).
    async fn choose(&self, producer: &str, endpoints: &[Endpoint], give_up: bool) -> Result<Result<Route, String>, ClientError> {
        let answers = identify_all(endpoints).await;
        let mut named: Vec<(String, &Endpoint)> = Vec::new();
        let mut fleet: Option<(Vec<String>, &str)> = None;
        let mut silent = Vec::new();
        for (e, answer) in endpoints.iter().zip(answers) {
            let id = match answer {
                Ok(id) => id,
                Err(why) => {
                    silent.push(format!("{} ({why})", e.url));
                    continue;
                }
            };
            if id.replica.is_empty() {
                return Err(ClientError::Setup(format!("--server names several replicas, but {} has no replica name (serve --replica-name): producer affinity needs every replica named", e.url)));
            }
            if !id.fleet.is_empty() {
                let mut f = id.fleet.clone();
                f.sort();
                match &fleet {
                    Some((g, other)) if *g != f => return Err(ClientError::Setup(format!("replicas disagree about their fleet: {} says [{}], {} says [{}]", other, g.join(", "), e.url, f.join(", ")))),
                    Some(_) => {}
                    None => fleet = Some((f, e.url.as_str())),
                }
            }
            if named.iter().any(|(n, _)| *n == id.replica) {
                continue; // the same replica under two addresses
            }
            named.push((id.replica, e));
        }
        // The fleet's names: as the replicas were configured, else every endpoint's name (all
        // must have answered: a missing name could be the producer's replica).
        let members: Vec<String> = match fleet {
            Some((f, _)) => f,
            None if silent.is_empty() => named.iter().map(|(n, _)| n.clone()).collect(),
            None if give_up && self.failover => named.iter().map(|(n, _)| n.clone()).collect(),
            None => return Ok(Err(format!("cannot tell which replica producer '{producer}' belongs to: no answer from {}", silent.join(", ")))),
        };
        if members.is_empty() {
            return Ok(Err(format!("no replica answered ({})", silent.join(", "))));
        }
        let order = affinity::preference(producer, &members);
        let at = |name: &str| named.iter().find(|(n, _)| n == name).map(|(_, e)| *e);
        if let Some(e) = at(order[0]) {
            return Ok(Ok(Route { conn: channel_to(&e.url, e.tls_name.as_deref())?, url: e.url.clone(), replica: Some(order[0].to_owned()), declared: members }));
        }
        let why = format!("replica {} (the replica of producer '{producer}') does not answer", order[0]);
        if give_up && self.failover {
            if let Some((name, e)) = order[1..].iter().find_map(|n| at(n).map(|e| (*n, e))) {
                eprintln!("mtgauge: {why}; failing over to replica {name} as --failover allows: a batch whose acknowledgement was lost may count twice");
                return Ok(Ok(Route { conn: channel_to(&e.url, e.tls_name.as_deref())?, url: e.url.clone(), replica: Some(name.to_owned()), declared: Vec::new() }));
            }
        }
        Ok(Err(why))
    }

    /// The server, when `--server` names one server rather than a fleet: one URL whose host is
    /// one address, or whose addresses do not name themselves as replicas (`localhost` may be
    /// both ::1 and 127.0.0.1: one server, reached as the URL says).
    pub async fn lone(&self) -> Result<Option<Endpoint>, ClientError> {
        if self.urls.len() > 1 {
            return Ok(None);
        }
        let given = Endpoint { url: self.urls[0].clone(), tls_name: None };
        let endpoints = self.endpoints().await?;
        if endpoints.len() <= 1 {
            return Ok(Some(given));
        }
        let named = identify_all(&endpoints).await.into_iter().any(|a| a.is_ok_and(|id| !id.replica.is_empty()));
        Ok((!named).then_some(given))
    }

    /// Every URL, with a host name that resolves to several addresses replaced by one URL per
    /// address (resolved again on every call).
    pub async fn endpoints(&self) -> Result<Vec<Endpoint>, ClientError> {
        let mut out = Vec::new();
        for u in &self.urls {
            let uri: tonic::transport::Uri = u.parse().map_err(|_| ClientError::Setup(format!("--server {u}: not a URL")))?;
            let host = uri.host().unwrap_or_default().trim_start_matches('[').trim_end_matches(']').to_owned();
            let scheme = uri.scheme_str().unwrap_or("http");
            let port = uri.port_u16().unwrap_or(if scheme == "https" { 443 } else { 80 });
            let literal = host.parse::<std::net::IpAddr>().is_ok();
            let addrs: Vec<std::net::SocketAddr> = if literal { Vec::new() } else { tokio::net::lookup_host((host.as_str(), port)).await.map(|a| a.collect()).unwrap_or_default() };
            let mut distinct: Vec<std::net::SocketAddr> = Vec::new();
            for a in addrs {
                if !distinct.contains(&a) {
                    distinct.push(a);
                }
            }
            if distinct.len() <= 1 {
                out.push(Endpoint { url: u.clone(), tls_name: None });
            } else {
                out.extend(distinct.into_iter().map(|a| Endpoint { url: format!("{scheme}://{a}"), tls_name: Some(host.clone()) }));
            }
        }
        Ok(out)
    }
}

/// The Identify answer of one endpoint, or why there is none.
pub async fn identify(e: Endpoint) -> Result<pb::ReplicaIdentity, String> {
    let conn = channel_to(&e.url, e.tls_name.as_deref()).map_err(|x| x.to_string())?;
    let mut c = pb::scoring_client::ScoringClient::new(conn);
    match tokio::time::timeout(IDENTIFY_TIMEOUT, c.identify(pb::IdentifyRequest {})).await {
        Ok(Ok(r)) => Ok(r.into_inner()),
        Ok(Err(s)) => Err(format!("{} ({:?})", s.message(), s.code())),
        Err(_) => Err(format!("no answer within {} s", IDENTIFY_TIMEOUT.as_secs())),
    }
}

/// Identify every endpoint, concurrently; answers in the endpoints' order.
async fn identify_all(endpoints: &[Endpoint]) -> Vec<Result<pb::ReplicaIdentity, String>> {
    let mut set = tokio::task::JoinSet::new();
    for (i, e) in endpoints.iter().enumerate() {
        let e = e.clone();
        set.spawn(async move { (i, identify(e).await) });
    }
    let mut out: Vec<Result<pb::ReplicaIdentity, String>> = endpoints.iter().map(|_| Err("not asked".to_owned())).collect();
    while let Some(done) = set.join_next().await {
        if let Ok((i, answer)) = done {
            out[i] = answer;
        }
    }
    out
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn server_lists_are_parsed() {
        let f = Fleet::parse("http://a:1, http://b:2,", DEFAULT_REPLICA_WAIT, false).unwrap();
        assert_eq!(f.urls(), ["http://a:1", "http://b:2"]);
        assert!(Fleet::parse(" , ", DEFAULT_REPLICA_WAIT, false).is_err());
        assert!(Fleet::parse("http://a:1,not a url", DEFAULT_REPLICA_WAIT, false).unwrap_err().to_string().contains("not a URL"));
    }

    #[tokio::test]
    async fn literal_addresses_stay_as_given() {
        let f = Fleet::parse("http://127.0.0.1:7410,http://[::1]:7411", DEFAULT_REPLICA_WAIT, false).unwrap();
        let e = f.endpoints().await.unwrap();
        assert_eq!(e, vec![Endpoint { url: "http://127.0.0.1:7410".into(), tls_name: None }, Endpoint { url: "http://[::1]:7411".into(), tls_name: None }]);
    }
}
