//! The cluster token: every call carries it as `authorization: Bearer
//! <token>`; servers compare it in constant time and answer
//! UNAUTHENTICATED, changing nothing, when it is missing or wrong.

use std::path::Path;
use std::sync::Arc;

use subtle::ConstantTimeEq;
use tonic::metadata::MetadataValue;
use tonic::service::Interceptor;
use tonic::{Request, Status};

/// Tokens shorter than this are refused: they could be guessed.
pub const MIN_TOKEN_CHARS: usize = 16;

/// A token file that cannot be read or holds no usable token: the user's
/// input, so the commands exit with their bad-input code.
#[derive(Debug, thiserror::Error)]
#[error("{0}")]
pub struct BadTokenFile(pub String);

/// The cluster's shared secret.
#[derive(Clone)]
pub struct Token(Arc<str>);

impl std::fmt::Debug for Token {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.write_str("Token(..)")
    }
}

impl Token {
    /// Reads a token file: one line of printable ASCII, at least 16 characters.
    pub fn read(path: &Path) -> anyhow::Result<Token> {
        let text = std::fs::read_to_string(path).map_err(|error| {
            BadTokenFile(format!(
                "{}: cannot read the token file: {error}",
                path.display()
            ))
        })?;
        Token::parse(text.trim())
            .map_err(|what| BadTokenFile(format!("{}: {what}", path.display())).into())
    }

    /// A token from its text.
    pub fn parse(text: &str) -> Result<Token, String> {
        if text.chars().count() < MIN_TOKEN_CHARS {
            return Err(format!(
                "the token must be at least {MIN_TOKEN_CHARS} characters"
            ));
        }
        if !text.chars().all(|c| c.is_ascii_graphic()) {
            return Err("the token must be printable ASCII without spaces".to_string());
        }
        Ok(Token(text.into()))
    }

    /// A fresh random token (32 hex digits of the system's randomness).
    pub fn random() -> Token {
        let bytes: [u8; 16] = rand::random();
        let text: String = bytes.iter().map(|b| format!("{b:02x}")).collect();
        Token(text.into())
    }

    pub fn as_str(&self) -> &str {
        &self.0
    }

    fn header(&self) -> String {
        format!("Bearer {}", self.0)
    }
}

/// The server side: refuses calls without the token.
#[derive(Clone)]
pub struct CheckToken {
    expected: Arc<[u8]>,
}

impl CheckToken {
    pub fn new(token: &Token) -> CheckToken {
        CheckToken {
            expected: token.header().into_bytes().into(),
        }
    }
}

impl Interceptor for CheckToken {
    fn call(&mut self, request: Request<()>) -> Result<Request<()>, Status> {
        let given = request
            .metadata()
            .get("authorization")
            .map(|value| value.as_bytes())
            .unwrap_or(b"");
        // Constant time in the token's bytes (the length is not secret).
        if given.len() == self.expected.len() && bool::from(given.ct_eq(&self.expected)) {
            Ok(request)
        } else {
            Err(Status::unauthenticated("missing or wrong cluster token"))
        }
    }
}

/// The client side: adds the token to every call.
#[derive(Clone)]
pub struct AddToken {
    value: MetadataValue<tonic::metadata::Ascii>,
}

impl AddToken {
    pub fn new(token: &Token) -> AddToken {
        AddToken {
            value: token
                .header()
                .parse()
                .expect("a printable ASCII token is a valid header"),
        }
    }
}

impl Interceptor for AddToken {
    fn call(&mut self, mut request: Request<()>) -> Result<Request<()>, Status> {
        request
            .metadata_mut()
            .insert("authorization", self.value.clone());
        Ok(request)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn only_the_exact_token_passes() {
        let token = Token::parse("0123456789abcdef0123").unwrap();
        let mut check = CheckToken::new(&token);
        let mut add = AddToken::new(&token);
        assert!(check.call(add.call(Request::new(())).unwrap()).is_ok());
        let other = Token::parse("0123456789abcdef0124").unwrap();
        let refused = check.call(AddToken::new(&other).call(Request::new(())).unwrap());
        assert_eq!(refused.unwrap_err().code(), tonic::Code::Unauthenticated);
        assert_eq!(
            check.call(Request::new(())).unwrap_err().code(),
            tonic::Code::Unauthenticated
        );
        assert!(Token::parse("short").is_err());
    }
}
