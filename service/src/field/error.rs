//! Typed link errors: each names the link and, for Modbus, the function, address and
//! exception, so a log line says exactly which request failed.

use std::fmt;

use super::codec::EncodeError;

/// A Modbus function Ridgeline uses, shown with its code.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Function {
    ReadHoldingRegisters,
    ReadInputRegisters,
    WriteSingleRegister,
    WriteMultipleRegisters,
}

impl Function {
    pub fn code(self) -> u8 {
        match self {
            Function::ReadHoldingRegisters => 0x03,
            Function::ReadInputRegisters => 0x04,
            Function::WriteSingleRegister => 0x06,
            Function::WriteMultipleRegisters => 0x10,
        }
    }
}

impl fmt::Display for Function {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        let name = match self {
            Function::ReadHoldingRegisters => "read holding registers",
            Function::ReadInputRegisters => "read input registers",
            Function::WriteSingleRegister => "write single register",
            Function::WriteMultipleRegisters => "write multiple registers",
        };
        write!(f, "{name} (0x{:02X})", self.code())
    }
}

/// Why a request on a link failed.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum LinkError {
    #[error("link {link}: cannot connect to {address}: {reason}")]
    Connect { link: String, address: String, reason: String },
    #[error("link {link}: not connected; next attempt in {retry_in_ms} ms")]
    Down { link: String, retry_in_ms: u64 },
    #[error("link {link}: {function} at register {address} got no answer within {timeout_ms} ms")]
    Timeout { link: String, function: Function, address: u16, timeout_ms: u64 },
    #[error("link {link}: {function} at register {address} answered with exception 0x{code:02X} ({name})")]
    Exception { link: String, function: Function, address: u16, code: u8, name: String },
    #[error("link {link}: {function} at register {address} failed: {reason}")]
    Transport { link: String, function: Function, address: u16, reason: String },
    #[error("link {link}: GET {url} answered HTTP {status}")]
    HttpStatus { link: String, url: String, status: u16 },
    #[error("link {link}: GET {url} failed: {reason}")]
    Http { link: String, url: String, reason: String },
    #[error("link {link}: tag {tag} at {pointer}: {found}")]
    NotNumeric { link: String, tag: String, pointer: String, found: String },
    #[error("link {link}: setpoint for register {address} refused: {source}")]
    Encode { link: String, address: u16, source: EncodeError },
}

impl LinkError {
    /// A short label for metrics and events.
    pub fn kind(&self) -> &'static str {
        match self {
            LinkError::Connect { .. } => "connect",
            LinkError::Down { .. } => "down",
            LinkError::Timeout { .. } => "timeout",
            LinkError::Exception { .. } => "exception",
            LinkError::Transport { .. } => "transport",
            LinkError::HttpStatus { .. } => "http_status",
            LinkError::Http { .. } => "http",
            LinkError::NotNumeric { .. } => "not_numeric",
            LinkError::Encode { .. } => "encode",
        }
    }

    /// Whether the Modbus link itself failed (and has logged it), as opposed to one
    /// request being refused or one value being unusable.
    pub fn is_connection(&self) -> bool {
        matches!(
            self,
            LinkError::Connect { .. }
                | LinkError::Down { .. }
                | LinkError::Timeout { .. }
                | LinkError::Transport { .. }
        )
    }

    /// Every kind, for metrics that start at zero.
    pub const KINDS: &'static [&'static str] = &[
        "connect",
        "down",
        "timeout",
        "exception",
        "transport",
        "http_status",
        "http",
        "not_numeric",
        "encode",
    ];
}
