//! The service config: typed structs, reading from TOML and validation.
//!
//! [`load`] and [`parse`] return either a whole [`Config`] or every problem found,
//! each with its key path and line (see [`read`] for how, [`validate`] for the rules).

pub mod read;
pub mod summary;
mod validate;

pub(crate) use validate::is_identifier;

use std::net::SocketAddr;
use std::path::{Path, PathBuf};

use crate::expr::Expr;
pub use read::{FileProblems, Problem};
use read::{FromToml, Mismatch, Problems, Table, string_enum};

/// A validated service config.
#[derive(Debug, Clone)]
pub struct Config {
    pub service: Service,
    pub access: Vec<Access>,
    pub links: Vec<Link>,
    pub tags: Vec<Tag>,
    pub loops: Vec<LoopConfig>,
}

#[derive(Debug, Clone)]
pub struct Service {
    pub listen: SocketAddr,
    pub database: PathBuf,
    /// Days raw samples are kept.
    pub retention_days: u32,
    /// Days the one-minute and one-hour rollups are kept.
    pub rollup_retention_days: u32,
    /// Free space (MiB) under the database below which a `disk_low` event is sent.
    pub disk_free_floor_mb: u32,
    pub open_reads: bool,
    pub log_format: LogFormat,
    /// With a certificate and key, the API serves HTTPS only.
    pub tls: Option<Tls>,
}

/// PEM files of the API's certificate (chain) and private key.
#[derive(Debug, Clone, PartialEq)]
pub struct Tls {
    pub cert: PathBuf,
    pub key: PathBuf,
}

string_enum! {
    pub enum LogFormat { Text = "text", Json = "json" }
}

#[derive(Clone)]
pub struct Access {
    pub name: String,
    /// Lower-case hex SHA-256 of the token; never logged.
    pub token_sha256: String,
    pub role: Role,
}

impl std::fmt::Debug for Access {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("Access").field("name", &self.name).field("role", &self.role).finish_non_exhaustive()
    }
}

string_enum! {
    pub enum Role { Viewer = "viewer", Operator = "operator" }
}

#[derive(Debug, Clone)]
pub struct Link {
    pub name: String,
    pub kind: LinkKind,
    pub timeout_ms: u64,
}

#[derive(Debug, Clone, PartialEq)]
pub enum LinkKind {
    /// `host:port` of a Modbus/TCP server, and the unit identifier to address.
    ModbusTcp { address: String, unit: u8 },
    /// URL of a JSON document fetched once per tick; for https://, a PEM file of
    /// certificates trusted beside the system's roots.
    HttpGet { url: String, ca_file: Option<PathBuf> },
}

#[derive(Debug, Clone)]
pub struct Tag {
    pub name: String,
    pub link: String,
    pub source: TagSource,
}

#[derive(Debug, Clone, PartialEq)]
pub enum TagSource {
    Register { space: RegisterSpace, address: u16, codec: Codec },
    JsonPointer(String),
}

string_enum! {
    /// Which Modbus register table a value lives in.
    pub enum RegisterSpace { Input = "input_register", Holding = "holding_register" }
}

/// How an engineering value is encoded in registers.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Codec {
    pub kind: RegisterType,
    pub word_order: WordOrder,
    pub scale: f64,
    pub offset: f64,
}

string_enum! {
    pub enum RegisterType { U16 = "u16", I16 = "i16", U32 = "u32", I32 = "i32", F32 = "f32" }
}

impl RegisterType {
    /// How many 16-bit registers one value takes.
    pub fn width(self) -> u16 {
        match self {
            RegisterType::U16 | RegisterType::I16 => 1,
            RegisterType::U32 | RegisterType::I32 | RegisterType::F32 => 2,
        }
    }
}

string_enum! {
    /// Word order of 32-bit values: `big` puts the high word in the lower register.
    pub enum WordOrder { Big = "big", Little = "little" }
}

string_enum! {
    pub enum Direction { Maximize = "maximize", Minimize = "minimize" }
}

string_enum! {
    pub enum MethodKind { Sine = "sine", Newton = "newton", Stepwise = "stepwise" }
}

string_enum! {
    /// What an operator asks a loop to do.
    pub enum Mode { Seeking = "seeking", Holding = "holding", Observing = "observing", Stopped = "stopped" }
}

string_enum! {
    pub enum OnShutdown { Hold = "hold", Safe = "safe" }
}

string_enum! {
    pub enum OnTrip { Safe = "safe", Hold = "hold" }
}

string_enum! {
    pub enum Recover { Manual = "manual", Auto = "auto" }
}

/// A closed range `[min, max]` of an input, in engineering units.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Range {
    pub min: f64,
    pub max: f64,
}

impl Range {
    pub fn contains(&self, v: f64) -> bool {
        self.min <= v && v <= self.max
    }
    pub fn span(&self) -> f64 {
        self.max - self.min
    }
}

impl std::fmt::Display for Range {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        write!(f, "[{}, {}]", show(self.min), show(self.max))
    }
}

/// A number for a message: as written for ordinary magnitudes, in scientific notation
/// beyond, so `1e300` never prints as 301 digits.
pub fn show(v: f64) -> String {
    if v == 0.0 || (1e-4..1e15).contains(&v.abs()) { v.to_string() } else { format!("{v:e}") }
}

impl FromToml for Range {
    const EXPECTED: &'static str = "a pair [min, max]";
    fn from_toml(
        value: &toml::de::DeValue<'_>,
        path: &str,
        problems: &Problems<'_>,
    ) -> Result<Self, Mismatch> {
        let [min, max] = <[f64; 2]>::from_toml(value, path, problems)?;
        Ok(Range { min, max })
    }
}

#[derive(Debug, Clone)]
pub struct LoopConfig {
    pub name: String,
    pub objective: Expr,
    pub direction: Direction,
    pub tick_s: f64,
    pub start_mode: Mode,
    pub permit: Option<String>,
    pub on_shutdown: OnShutdown,
    /// What is known of the plant (`[loops.model]`); `curvature` also from the old
    /// loop key `curvature_hint`.
    pub model: Option<PlantModel>,
    /// The method and what only it uses (`[loops.filter]`, `[loops.newton]`,
    /// `[loops.stepwise]`).
    pub method: MethodConfig,
    pub watchdog: Watchdog,
    pub heartbeat: Option<Heartbeat>,
    pub inputs: Vec<InputConfig>,
    /// Limits on measured values the loop keeps to (`[[loops.constraints]]`).
    pub constraints: Vec<ConstraintConfig>,
}

/// What is known of a loop's plant: a first-order lag with dead time (zero when not
/// known), the curvature `|d2J/du2|` near the optimum and the objective's noise.
#[derive(Debug, Clone, Copy, Default, PartialEq)]
pub struct PlantModel {
    pub lag_s: f64,
    pub dead_time_s: f64,
    pub curvature: Option<f64>,
    pub noise_std: Option<f64>,
}

impl LoopConfig {
    /// `|d2J/du2|` when the config gives it.
    pub fn curvature(&self) -> Option<f64> {
        self.model.and_then(|m| m.curvature)
    }

    /// The high-pass and demodulation settings of the dithering methods.
    pub fn filter(&self) -> Option<&Filter> {
        match &self.method {
            MethodConfig::Sine { filter } | MethodConfig::Newton { filter, .. } => Some(filter),
            MethodConfig::Stepwise(_) => None,
        }
    }

    /// How long one cycle of the method takes: the longest dither period, or a dwell.
    /// A stored estimate older than ten of these is too old to resume from.
    pub fn cycle_s(&self) -> f64 {
        match &self.method {
            MethodConfig::Stepwise(s) => s.dwell_s,
            _ => self.inputs.iter().filter_map(|i| i.dither).map(|d| d.period_s).fold(0.0, f64::max),
        }
    }
}

/// A limit on a measured value that a loop keeps to (`[[loops.constraints]]`).
#[derive(Debug, Clone)]
pub struct ConstraintConfig {
    pub name: String,
    /// An expression over tags, like the objective.
    pub value: Expr,
    pub limit: Limit,
    pub handling: Handling,
}

/// The side of a constraint that is allowed: at most `max`, or at least `min`.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum Limit {
    Max(f64),
    Min(f64),
}

impl Limit {
    pub fn value(self) -> f64 {
        match self {
            Limit::Max(v) | Limit::Min(v) => v,
        }
    }

    /// `max` or `min`, as in the config.
    pub fn side(self) -> &'static str {
        match self {
            Limit::Max(_) => "max",
            Limit::Min(_) => "min",
        }
    }

    /// How far `v` lies past the limit: positive past it, zero on it, negative inside.
    pub fn excess(self, v: f64) -> f64 {
        match self {
            Limit::Max(m) => v - m,
            Limit::Min(m) => m - v,
        }
    }
}

impl std::fmt::Display for Limit {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        match self {
            Limit::Max(v) => write!(f, "at most {}", show(*v)),
            Limit::Min(v) => write!(f, "at least {}", show(*v)),
        }
    }
}

/// What a loop does about a constraint.
#[derive(Debug, Clone, PartialEq)]
pub enum Handling {
    /// The objective the core sees is worsened by `weight * excess^2` past the limit.
    Penalty { weight: f64 },
    /// Past the limit the loop walks the inputs in `moves` at their rate limit, without
    /// dither, until the value is `margin` inside the limit.
    BackOff { moves: Vec<Relief>, margin: f64 },
}

impl Handling {
    pub fn kind(&self) -> HandlingKind {
        match self {
            Handling::Penalty { .. } => HandlingKind::Penalty,
            Handling::BackOff { .. } => HandlingKind::BackOff,
        }
    }
}

string_enum! {
    pub enum HandlingKind { BackOff = "back_off", Penalty = "penalty" }
}

/// An input that relieves a back-off constraint, and which way.
#[derive(Debug, Clone, PartialEq)]
pub struct Relief {
    pub input: String,
    pub way: Way,
}

string_enum! {
    pub enum Way { Up = "up", Down = "down" }
}

impl Way {
    /// +1 for up, -1 for down.
    pub fn sign(self) -> f64 {
        match self {
            Way::Up => 1.0,
            Way::Down => -1.0,
        }
    }
}

/// A loop's method with the settings only it uses.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum MethodConfig {
    Sine { filter: Filter },
    Newton { filter: Filter, newton: NewtonConfig },
    Stepwise(StepwiseConfig),
}

impl MethodConfig {
    pub fn kind(&self) -> MethodKind {
        match self {
            MethodConfig::Sine { .. } => MethodKind::Sine,
            MethodConfig::Newton { .. } => MethodKind::Newton,
            MethodConfig::Stepwise(_) => MethodKind::Stepwise,
        }
    }
}

/// `[loops.newton]`.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct NewtonConfig {
    /// The convergence time constant, whatever the curvature.
    pub time_constant_s: f64,
    /// Cutoff of the curvature estimate's filter.
    pub hessian_hz: f64,
    /// The curvature to start from; `[loops.model]` curvature when not given.
    pub initial_curvature: Option<f64>,
}

/// `[loops.stepwise]`.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct StepwiseConfig {
    /// How long each setpoint is held.
    pub dwell_s: f64,
    /// The end of each dwell over which the objective is averaged.
    pub average_s: f64,
}

#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Filter {
    pub highpass_hz: f64,
    pub lowpass_hz: Option<f64>,
    pub phase_deg: f64,
}

#[derive(Debug, Clone, Copy)]
pub struct Watchdog {
    pub stale_after_s: f64,
    pub objective_range: Option<Range>,
    pub on_trip: OnTrip,
    pub recover: Recover,
    pub recover_after_s: Option<f64>,
}

#[derive(Debug, Clone)]
pub struct Heartbeat {
    pub link: String,
    pub holding_register: u16,
}

#[derive(Debug, Clone)]
pub struct InputConfig {
    pub name: String,
    pub write: WriteTarget,
    pub limits: Range,
    pub bounds: Range,
    pub safe: f64,
    pub max_rate_per_s: f64,
    /// The sinusoidal perturbation of sine and newton; none for stepwise.
    pub dither: Option<Dither>,
    /// The sine method's integrator gain.
    pub gain: Option<f64>,
    /// The stepwise method's step.
    pub step: Option<f64>,
}

/// An input's sinusoidal perturbation.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Dither {
    pub amplitude: f64,
    pub period_s: f64,
}

impl Dither {
    pub fn hz(&self) -> f64 {
        1.0 / self.period_s
    }
}

impl InputConfig {
    /// The dither amplitude, zero for a method without dither.
    pub fn dither_amplitude(&self) -> f64 {
        self.dither.map_or(0.0, |d| d.amplitude)
    }

    /// Whether `bounds` may replace this input's operating bounds at run time: finite,
    /// not empty, inside the limits, and wide enough for the dither.
    pub fn check_bounds(&self, bounds: Range) -> Result<(), String> {
        if !(bounds.min.is_finite() && bounds.max.is_finite()) {
            Err("min and max must be finite numbers".into())
        } else if bounds.min >= bounds.max {
            Err(format!("{bounds} is empty: min must be below max"))
        } else if !(self.limits.contains(bounds.min) && self.limits.contains(bounds.max)) {
            Err(format!("{bounds} reaches outside the limits {}", self.limits))
        } else if bounds.span() < 2.0 * self.dither_amplitude() {
            Err(format!(
                "{bounds} is narrower than twice the dither amplitude ({})",
                show(2.0 * self.dither_amplitude())
            ))
        } else {
            Ok(())
        }
    }
}

/// The holding register a setpoint is written to.
#[derive(Debug, Clone)]
pub struct WriteTarget {
    pub link: String,
    pub holding_register: u16,
    pub codec: Codec,
}

impl Config {
    pub fn link(&self, name: &str) -> Option<&Link> {
        self.links.iter().find(|l| l.name == name)
    }
    pub fn tag(&self, name: &str) -> Option<&Tag> {
        self.tags.iter().find(|t| t.name == name)
    }
}

/// Reads and validates a config file.
pub fn load(path: &Path) -> Result<Config, FileProblems> {
    let (text, file) = read::read_file(path)?;
    parse(&text, &file)
}

/// Reads and validates a config file whose loops each get a plant of their own (`rehearse
/// --separately`): loops may write the same registers.
pub fn load_loops_apart(path: &Path) -> Result<Config, FileProblems> {
    let (text, file) = read::read_file(path)?;
    read::document(
        &text,
        &file,
        &["service", "access", "links", "tags", "loops"],
        read_config,
        validate::validate_loops_apart,
    )
}

/// Parses and validates config text; `file` names it in problems.
pub fn parse(text: &str, file: &str) -> Result<Config, FileProblems> {
    read::document(
        text,
        file,
        &["service", "access", "links", "tags", "loops"],
        read_config,
        validate::validate,
    )
}

fn read_config(t: &Table) -> Option<Config> {
    let service = match t.table(
        "service",
        &[
            "listen",
            "database",
            "retention_days",
            "rollup_retention_days",
            "disk_free_floor_mb",
            "open_reads",
            "log_format",
            "tls_cert",
            "tls_key",
        ],
    ) {
        Some(s) => read_service(&s),
        None if t.has("service") => None,
        None => Some(Service::default()),
    };
    let access: Vec<_> =
        t.tables("access", &["name", "token_sha256", "role"]).iter().map(read_access).collect();
    let links: Vec<_> = t
        .named_tables("links", &["modbus_tcp", "unit", "http_get", "ca_file", "timeout_ms"])
        .iter()
        .map(|(name, l)| read_link(name, l))
        .collect();
    let tags: Vec<_> = t
        .named_tables(
            "tags",
            &[
                "link",
                "input_register",
                "holding_register",
                "type",
                "word_order",
                "scale",
                "offset",
                "json_pointer",
            ],
        )
        .iter()
        .map(|(name, tag)| read_tag(name, tag))
        .collect();
    let loops = t.tables("loops", LOOP_KEYS);
    if loops.is_empty() {
        t.problem("no [[loops]]: a config needs at least one loop");
    }
    let loops: Vec<_> = loops.iter().map(read_loop).collect();
    Some(Config {
        service: service?,
        access: access.into_iter().collect::<Option<_>>()?,
        links: links.into_iter().collect::<Option<_>>()?,
        tags: tags.into_iter().collect::<Option<_>>()?,
        loops: loops.into_iter().collect::<Option<_>>()?,
    })
}

impl Default for Service {
    fn default() -> Self {
        Service {
            listen: SocketAddr::from(([127, 0, 0, 1], 8080)),
            database: PathBuf::from("/var/lib/ridgeline/history.db"),
            retention_days: 30,
            rollup_retention_days: 730,
            disk_free_floor_mb: 1024,
            open_reads: true,
            log_format: LogFormat::Text,
            tls: None,
        }
    }
}

fn read_service(t: &Table) -> Option<Service> {
    let d = Service::default();
    let listen = t.opt::<String>("listen").map_or(Some(d.listen), |s| match s.parse() {
        Ok(addr) => Some(addr),
        Err(_) => {
            t.problem_at("listen", format!("`{s}` is not an address like 127.0.0.1:8080"));
            None
        }
    });
    let database = t.opt::<String>("database").map_or(Some(d.database), |s| {
        if s.is_empty() {
            t.problem_at("database", "the database path is empty");
        }
        Some(PathBuf::from(s))
    });
    let tls = match (t.opt::<String>("tls_cert"), t.opt::<String>("tls_key")) {
        (Some(cert), Some(key)) => Some(Some(Tls { cert: cert.into(), key: key.into() })),
        (None, None) => Some(None),
        (Some(_), None) => {
            t.problem_at(
                "tls_cert",
                "needs `tls_key` beside it (the PEM file of the certificate's private key)",
            );
            None
        }
        (None, Some(_)) => {
            t.problem_at("tls_key", "needs `tls_cert` beside it (the PEM file of the certificate)");
            None
        }
    };
    Some(Service {
        listen: listen?,
        database: database?,
        retention_days: t.or("retention_days", d.retention_days)?,
        rollup_retention_days: t.or("rollup_retention_days", d.rollup_retention_days)?,
        disk_free_floor_mb: t.or("disk_free_floor_mb", d.disk_free_floor_mb)?,
        open_reads: t.or("open_reads", d.open_reads)?,
        log_format: t.or("log_format", d.log_format)?,
        tls: tls?,
    })
}

fn read_access(t: &Table) -> Option<Access> {
    let hash: Option<String> = t.req("token_sha256");
    let hash = hash.and_then(|h| {
        if h.len() == 64 && h.bytes().all(|b| b.is_ascii_hexdigit()) {
            Some(h.to_ascii_lowercase())
        } else {
            // Never echo the value: it may be a pasted token rather than its hash.
            t.problem_at("token_sha256", "must be 64 hexadecimal characters (the SHA-256 of the token, as `ridgeline token` prints it)");
            None
        }
    });
    Some(Access { name: t.req("name")?, token_sha256: hash?, role: t.req("role")? })
}

fn read_link(name: &str, t: &Table) -> Option<Link> {
    let modbus: Option<String> = t.opt("modbus_tcp");
    let http: Option<String> = t.opt("http_get");
    let unit = t.or("unit", 1u8);
    let timeout_ms = t.or("timeout_ms", 1000u64);
    let ca_file: Option<String> = t.opt("ca_file");
    let kind = match (modbus, http, t.has("modbus_tcp"), t.has("http_get")) {
        (Some(address), None, _, false) => {
            if t.has("ca_file") {
                t.problem_at("ca_file", "`ca_file` belongs to https:// links, not Modbus ones");
            }
            Some(LinkKind::ModbusTcp { address, unit: unit? })
        }
        (None, Some(url), false, _) => {
            if t.has("unit") {
                t.problem_at("unit", "`unit` belongs to Modbus links, not HTTP ones");
            }
            Some(LinkKind::HttpGet { url, ca_file: ca_file.map(PathBuf::from) })
        }
        (_, _, true, true) => {
            t.problem("a link is either `modbus_tcp` or `http_get`, not both");
            None
        }
        (None, None, false, false) => {
            t.problem("a link needs `modbus_tcp = \"host:port\"` or `http_get = \"http://...\"`");
            None
        }
        _ => None,
    };
    Some(Link { name: name.to_owned(), kind: kind?, timeout_ms: timeout_ms? })
}

fn read_codec(t: &Table) -> Option<Codec> {
    Some(Codec {
        kind: t.req("type")?,
        word_order: t.or("word_order", WordOrder::Big)?,
        scale: t.or("scale", 1.0)?,
        offset: t.or("offset", 0.0)?,
    })
}

fn read_tag(name: &str, t: &Table) -> Option<Tag> {
    let link: Option<String> = t.req("link");
    let input: Option<u16> = t.opt("input_register");
    let holding: Option<u16> = t.opt("holding_register");
    let pointer: Option<String> = t.opt("json_pointer");
    let present = ["input_register", "holding_register", "json_pointer"].map(|k| t.has(k));
    let source = match present {
        [true, false, false] => {
            Some(TagSource::Register { space: RegisterSpace::Input, address: input?, codec: read_codec(t)? })
        }
        [false, true, false] => Some(TagSource::Register {
            space: RegisterSpace::Holding,
            address: holding?,
            codec: read_codec(t)?,
        }),
        [false, false, true] => {
            for key in ["type", "word_order", "scale", "offset"] {
                if t.has(key) {
                    t.problem_at(
                        key,
                        format!("`{key}` describes registers; a JSON value is read as a number as it is"),
                    );
                }
            }
            Some(TagSource::JsonPointer(pointer?))
        }
        [false, false, false] => {
            t.problem("a tag needs one of `input_register`, `holding_register` or `json_pointer`");
            None
        }
        _ => {
            t.problem("a tag has exactly one of `input_register`, `holding_register` or `json_pointer`");
            None
        }
    };
    Some(Tag { name: name.to_owned(), link: link?, source: source? })
}

const LOOP_KEYS: &[&str] = &[
    "name",
    "objective",
    "direction",
    "method",
    "tick_s",
    "start_mode",
    "permit",
    "on_shutdown",
    "curvature_hint",
    "model",
    "filter",
    "newton",
    "stepwise",
    "watchdog",
    "heartbeat",
    "inputs",
    "constraints",
];

fn read_loop(t: &Table) -> Option<LoopConfig> {
    let objective = t.expr("objective");
    let kind: Option<MethodKind> = t.or("method", MethodKind::Sine);
    let method = kind.and_then(|kind| read_method(t, kind));
    let watchdog = t
        .table("watchdog", &["stale_after_s", "objective_range", "on_trip", "recover", "recover_after_s"])
        .map(|w| {
            Some(Watchdog {
                stale_after_s: w.req("stale_after_s")?,
                objective_range: w.opt("objective_range"),
                on_trip: w.or("on_trip", OnTrip::Safe)?,
                recover: w.or("recover", Recover::Manual)?,
                recover_after_s: w.opt("recover_after_s"),
            })
        });
    if !t.has("watchdog") {
        t.problem("missing table [loops.watchdog] (at least `stale_after_s`)");
    }
    let model = t.table("model", &["lag_s", "dead_time_s", "curvature", "noise_std"]).map(|m| {
        Some(PlantModel {
            lag_s: m.or("lag_s", 0.0)?,
            dead_time_s: m.or("dead_time_s", 0.0)?,
            curvature: m.opt("curvature"),
            noise_std: m.opt("noise_std"),
        })
    });
    let hint = t.opt::<f64>("curvature_hint").filter(|&c| {
        let valid = c > 0.0 && c.is_finite();
        if !valid {
            t.problem_at("curvature_hint", "must be greater than zero (it is |d2J/du2|)");
        }
        valid
    });
    let model = match (model.flatten(), hint) {
        (Some(m), Some(_)) if m.curvature.is_some() => {
            t.problem_at("curvature_hint", "is the old name of [loops.model] `curvature`: give it once");
            None
        }
        (Some(m), hint) => Some(PlantModel { curvature: m.curvature.or(hint), ..m }),
        (None, Some(c)) => Some(PlantModel { curvature: Some(c), ..PlantModel::default() }),
        (None, None) => None,
    };
    let heartbeat = t
        .table("heartbeat", &["link", "holding_register"])
        .map(|h| Some(Heartbeat { link: h.req("link")?, holding_register: h.req("holding_register")? }));
    // An optional value that is present but unreadable is already a recorded problem, so
    // reading it as absent cannot let a bad config through.
    let inputs = t.tables("inputs", INPUT_KEYS);
    if inputs.is_empty() {
        t.problem("a loop needs at least one [[loops.inputs]]");
    }
    let inputs: Vec<_> = inputs.iter().map(|i| read_input(i, kind?)).collect();
    let constraints: Vec<_> = t.tables("constraints", CONSTRAINT_KEYS).iter().map(read_constraint).collect();
    Some(LoopConfig {
        name: t.req("name")?,
        objective: objective?,
        direction: t.req("direction")?,
        tick_s: t.req("tick_s")?,
        start_mode: t.or("start_mode", Mode::Observing)?,
        permit: t.opt("permit"),
        on_shutdown: t.or("on_shutdown", OnShutdown::Hold)?,
        model,
        method: method?,
        watchdog: watchdog??,
        heartbeat: heartbeat.flatten(),
        inputs: inputs.into_iter().collect::<Option<_>>()?,
        constraints: constraints.into_iter().collect::<Option<_>>()?,
    })
}

const CONSTRAINT_KEYS: &[&str] = &["name", "value", "min", "max", "handling", "move", "margin", "weight"];

fn read_constraint(t: &Table) -> Option<ConstraintConfig> {
    let name: Option<String> = t.req("name");
    let value = t.expr("value");
    let (min, max): (Option<f64>, Option<f64>) = (t.opt("min"), t.opt("max"));
    let limit = match (t.has("min"), t.has("max")) {
        (true, true) => {
            t.problem("give `min` or `max`, not both: a constraint with two sides is two constraints");
            None
        }
        (false, false) => {
            t.problem("missing `min` or `max`: the limit the value must keep to");
            None
        }
        (true, false) => min.map(Limit::Min),
        (false, true) => max.map(Limit::Max),
    };
    let kind: Option<HandlingKind> = t.req("handling");
    let refuse = |key: &str, why: &str| {
        if t.has(key) {
            t.problem_at(
                key,
                format!("not used by handling = \"{}\": {why}", kind.map_or("", |k| k.as_str())),
            );
        }
    };
    let handling = match kind? {
        HandlingKind::Penalty => {
            refuse("move", "`move` and `margin` belong to handling = \"back_off\"");
            refuse("margin", "`move` and `margin` belong to handling = \"back_off\"");
            if !t.has("weight") {
                t.problem(
                    "handling = \"penalty\" needs `weight` (the objective is worsened by weight * excess^2)",
                );
            }
            Handling::Penalty { weight: t.opt("weight")? }
        }
        HandlingKind::BackOff => {
            refuse(
                "weight",
                "`weight` belongs to handling = \"penalty\"; back_off walks the inputs in `move`",
            );
            if !t.has("move") {
                t.problem(
                    "handling = \"back_off\" needs `move`, the inputs that relieve the constraint and which way, \
                     like move = { o2_setpoint_pct = \"up\" }",
                );
            }
            let moves: Vec<(String, Way)> = t.map("move")?;
            if moves.is_empty() {
                t.problem_at("move", "names no input: back_off needs at least one input to walk");
            }
            let moves = moves.into_iter().map(|(input, way)| Relief { input, way }).collect();
            Handling::BackOff { moves, margin: t.or("margin", 0.0)? }
        }
    };
    Some(ConstraintConfig { name: name?, value: value?, limit: limit?, handling })
}

const INPUT_KEYS: &[&str] = &[
    "name",
    "write",
    "limits",
    "bounds",
    "safe",
    "max_rate_per_s",
    "dither_amplitude",
    "dither_period_s",
    "gain",
    "step",
];

/// The method's own tables of a loop; the others' tables are refused by name.
fn read_method(t: &Table, kind: MethodKind) -> Option<MethodConfig> {
    let own = match kind {
        MethodKind::Sine => ["filter"].as_slice(),
        MethodKind::Newton => &["filter", "newton"],
        MethodKind::Stepwise => &["stepwise"],
    };
    for key in ["filter", "newton", "stepwise"] {
        if !own.contains(&key) && t.has(key) {
            let why = match key {
                "filter" => "the stepwise method has no dither to filter".to_owned(),
                _ => format!("[loops.{key}] belongs to method = \"{key}\""),
            };
            t.problem_at(key, format!("not used by method = \"{kind}\": {why}"));
        }
    }
    let missing = |key: &str, what: &str| {
        if !t.has(key) {
            t.problem(format!("method = \"{kind}\" needs [loops.{key}] ({what})"));
        }
    };
    let filter = || {
        missing("filter", "at least `highpass_hz`");
        let f = t.table("filter", &["highpass_hz", "lowpass_hz", "phase_deg"])?;
        Some(Filter {
            highpass_hz: f.req("highpass_hz")?,
            lowpass_hz: f.opt("lowpass_hz"),
            phase_deg: f.or("phase_deg", 0.0)?,
        })
    };
    match kind {
        MethodKind::Sine => Some(MethodConfig::Sine { filter: filter()? }),
        MethodKind::Newton => {
            let filter = filter();
            missing("newton", "at least `time_constant_s` and `hessian_hz`");
            let n = t.table("newton", &["time_constant_s", "hessian_hz", "initial_curvature"])?;
            let newton = NewtonConfig {
                time_constant_s: n.req("time_constant_s")?,
                hessian_hz: n.req("hessian_hz")?,
                initial_curvature: n.opt("initial_curvature"),
            };
            Some(MethodConfig::Newton { filter: filter?, newton })
        }
        MethodKind::Stepwise => {
            missing("stepwise", "`dwell_s` and `average_s`");
            let s = t.table("stepwise", &["dwell_s", "average_s"])?;
            Some(MethodConfig::Stepwise(StepwiseConfig {
                dwell_s: s.req("dwell_s")?,
                average_s: s.req("average_s")?,
            }))
        }
    }
}

fn read_input(t: &Table, method: MethodKind) -> Option<InputConfig> {
    let write =
        t.table("write", &["link", "holding_register", "type", "word_order", "scale", "offset"]).map(|w| {
            Some(WriteTarget {
                link: w.req("link")?,
                holding_register: w.req("holding_register")?,
                codec: read_codec(&w)?,
            })
        });
    if !t.has("write") {
        t.problem(
            "missing key `write` (a table like { link = \"plc\", holding_register = 200, type = \"f32\" })",
        );
    }
    // Each method reads its own keys and refuses the others', naming what they are for.
    let refuse = |key: &str, why: &str| {
        if t.has(key) {
            t.problem_at(key, format!("not used by method = \"{method}\": {why}"));
        }
    };
    let dither =
        || Some(Dither { amplitude: t.req("dither_amplitude")?, period_s: t.req("dither_period_s")? });
    // `Some(None)`: the method needs the key and it is missing or unreadable (a recorded
    // problem); `None`: the method does not use it.
    let (dither, gain, step) = match method {
        MethodKind::Sine => {
            refuse("step", "`step` belongs to the stepwise method");
            (Some(dither()), Some(t.req("gain")), None)
        }
        MethodKind::Newton => {
            refuse("gain", "its speed is [loops.newton] `time_constant_s`, whatever the curvature");
            refuse("step", "`step` belongs to the stepwise method");
            (Some(dither()), None, None)
        }
        MethodKind::Stepwise => {
            for key in ["dither_amplitude", "dither_period_s"] {
                refuse(key, "the stepwise method steps the input by `step`; it has no dither");
            }
            refuse("gain", "the stepwise method moves by `step` each dwell; it has no gain");
            (None, None, Some(t.req("step")))
        }
    };
    fn needed<T>(value: Option<Option<T>>) -> Option<Option<T>> {
        value.map_or(Some(None), |v| v.map(Some))
    }
    let (dither, gain, step) = (needed(dither), needed(gain), needed(step));
    Some(InputConfig {
        name: t.req("name")?,
        write: write??,
        limits: t.req("limits")?,
        bounds: t.req("bounds")?,
        safe: t.req("safe")?,
        max_rate_per_s: t.req("max_rate_per_s")?,
        dither: dither?,
        gain: gain?,
        step: step?,
    })
}
