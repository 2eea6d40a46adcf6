//! The status page: server-rendered HTML with inline SVG on the status (metrics) listener,
//! for operators — per recipient domain, the verdict volume over time, the false-positive
//! estimate and its bound against the target, the thresholds in force, the margins of
//! reported mail, held mail with its reasons and the audit queue.
//!
//! Rooms: [`page`] gathers the model from the store and the policy, [`render`] and
//! [`svg`] write it, [`html`] is the one way text reaches the document, [`auth`] decides
//! who may read and act, [`actions`] carries out reports and releases behind the
//! [`actions::Operations`] trait. [`crate::server::http`] routes requests here.
//!
//! Invariants: the page is read-only unless `[status] token_file` is set, and every action
//! then passes [`auth::authorize`]; every page request names an allowed host; everything
//! from a message or a peer is escaped; each request does a bounded amount of store work
//! (see [`page`]); the calls here block on the store and are made from blocking threads.

pub mod actions;
pub mod auth;
pub mod html;
pub mod page;
pub mod render;
pub mod svg;

use std::sync::Arc;

use crate::config::StatusConfig;
use crate::server::engine::SharedEngine;
use crate::server::http::{Request, Response};
use crate::store::{ReportKind, ReportSource, ReportStatus, Store};
use actions::{ActionError, Operations, StoreOperations, Verb};
use auth::{Refusal, Token};
use page::{Context, DEFAULT_WINDOW, Window};

/// Largest action request body accepted, in bytes.
pub const MAX_ACTION_BODY: usize = 4096;

/// What the page needs: the store, the engine (for the policy and model in force), the
/// operations, and its settings.
pub struct StatusPage {
    store: Option<Arc<dyn Store>>,
    engine: SharedEngine,
    operations: Option<Arc<dyn Operations>>,
    token: Option<Token>,
    settings: StatusConfig,
}

impl std::fmt::Debug for StatusPage {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("StatusPage")
            .field(
                "store",
                &self.store.as_ref().map(|s| s.location().to_path_buf()),
            )
            .field("token", &self.token)
            .field("settings", &self.settings)
            .finish_non_exhaustive()
    }
}

impl StatusPage {
    /// A page over `store` (none: the page says so), reading the token file the settings
    /// name. Reports go to the store ([`StoreOperations`]); releases are not available
    /// until [`StatusPage::with_operations`] wires in operations that can deliver.
    pub fn new(
        settings: &StatusConfig,
        engine: SharedEngine,
        store: Option<Arc<dyn Store>>,
    ) -> Result<StatusPage, auth::TokenError> {
        let token = match &settings.token_file {
            Some(path) => Some(Token::read(path)?),
            None => None,
        };
        let operations = store
            .as_ref()
            .map(|s| Arc::new(StoreOperations::new(Arc::clone(s))) as Arc<dyn Operations>);
        Ok(StatusPage {
            store,
            engine,
            operations,
            token,
            settings: settings.clone(),
        })
    }

    /// The same page with other operations (e.g. ones that can release over SMTP).
    pub fn with_operations(mut self, operations: Arc<dyn Operations>) -> StatusPage {
        self.operations = Some(operations);
        self
    }

    /// The same page with a token given in memory (tests, embedding).
    pub fn with_token(mut self, token: Option<Token>) -> StatusPage {
        self.token = token;
        self
    }

    fn context(&self, window: Window) -> Context {
        let engine = self.engine.current();
        Context {
            now: crate::store::record::now(),
            window,
            model: engine.origin().to_string(),
            policy: engine.decisions().policy.clone(),
            actions: self.token.is_some(),
            store: self
                .store
                .as_ref()
                .map(|s| s.location().display().to_string()),
        }
    }

    fn window(request: &Request) -> Window {
        request
            .query_value("w")
            .and_then(|w| Window::named(&w))
            .unwrap_or(DEFAULT_WINDOW)
    }

    /// `GET /`: every domain.
    pub fn overview(&self, request: &Request) -> Response {
        if let Err(refusal) = auth::check_host(request, &self.settings.host_names) {
            return refused(&refusal);
        }
        let context = self.context(Self::window(request));
        let Some(store) = &self.store else {
            let empty = page::Overview {
                context,
                domains: Vec::new(),
                more_domains: 0,
                volume: Vec::new(),
                held: Default::default(),
            };
            return Response::html(200, render::overview(&empty));
        };
        match page::overview(store.as_ref(), context.clone()) {
            Ok(o) => Response::html(200, render::overview(&o)),
            Err(e) => failed(&context, &e.to_string(), None),
        }
    }

    /// `GET /domain?d=NAME`: one domain's view.
    pub fn domain(&self, request: &Request) -> Response {
        if let Err(refusal) = auth::check_host(request, &self.settings.host_names) {
            return refused(&refusal);
        }
        let context = self.context(Self::window(request));
        let Some(name) = request.query_value("d") else {
            return Response::text(
                400,
                "no domain named: open /domain?d=NAME (an empty NAME is recipients without a domain)\n",
            );
        };
        let name = crate::policy::domain::normalize(&name);
        let Some(store) = &self.store else {
            return Response::html(
                200,
                render::message(
                    &context,
                    "no store",
                    "This daemon runs without a store: nothing is journaled or held.",
                    Some(&name),
                ),
            );
        };
        let offset = request
            .query_value("held")
            .and_then(|v| v.parse::<u64>().ok())
            .unwrap_or(0)
            .min(1_000_000);
        let audit_size = self.settings.audit_size as usize;
        match page::domain(
            store.as_ref(),
            context.clone(),
            &name,
            offset,
            audit_size,
            self.settings.audit_seed,
        ) {
            Ok(view) => Response::html(200, render::domain(&view)),
            Err(e) => failed(&context, &e.to_string(), Some(&name)),
        }
    }

    /// `POST /act`: a report or a release, once [`auth::authorize`] lets it through.
    pub fn act(&self, request: &Request) -> Response {
        if let Err(refusal) = auth::check_host(request, &self.settings.host_names) {
            return refused(&refusal);
        }
        // Refuse before reading the form when no token is configured or the request is
        // cross-site: nothing in the body matters then.
        if self.token.is_none() {
            return refused(&Refusal::ReadOnly);
        }
        if let Err(refusal) = auth::check_same_site(request) {
            return refused(&refusal);
        }
        let content_type = request.header("content-type").unwrap_or("");
        if !content_type
            .trim()
            .to_ascii_lowercase()
            .starts_with("application/x-www-form-urlencoded")
        {
            return Response::text(
                415,
                "send the action as application/x-www-form-urlencoded: act=VERB:VERDICT_ID&domain=NAME\n",
            );
        }
        let Ok(body) = std::str::from_utf8(&request.body) else {
            return Response::text(400, "the form is not UTF-8 text\n");
        };
        let form = match actions::parse_form(body) {
            Ok(form) => form,
            Err(e) => return Response::text(400, &format!("{e}\n")),
        };
        if let Err(refusal) = auth::authorize(request, self.token.as_ref(), form.token.as_deref()) {
            return refused(&refusal);
        }
        let context = self.context(DEFAULT_WINDOW);
        let domain = form.domain.as_deref().map(crate::policy::domain::normalize);
        let Some(operations) = &self.operations else {
            return Response::text(
                503,
                "not available: this daemon runs without a store, so nothing can be reported or released\n",
            );
        };
        let back = domain.as_deref();
        match form.verb {
            Verb::Report(kind, source) => {
                match operations.report(&form.verdict_id, kind, source, domain.as_deref()) {
                    Ok(receipt) => {
                        let text = format!(
                            "Recorded report {} on verdict {}: {} ({}) — {}",
                            receipt.id,
                            form.verdict_id,
                            kind_word(kind),
                            source_word(source),
                            status_words(receipt.status)
                        );
                        Response::html(200, render::message(&context, "recorded", &text, back))
                    }
                    Err(e) => action_failed(&context, &e, back),
                }
            }
            Verb::Release => match operations.release(&form.verdict_id) {
                Ok(done) => {
                    let text = format!(
                        "Released verdict {} to {} recipients; counted as a legitimate report.",
                        form.verdict_id, done.recipients
                    );
                    Response::html(200, render::message(&context, "released", &text, back))
                }
                Err(e) => action_failed(&context, &e, back),
            },
        }
    }
}

fn kind_word(kind: ReportKind) -> &'static str {
    match kind {
        ReportKind::Junk => "junk",
        ReportKind::NotJunk => "legitimate",
    }
}

fn source_word(source: ReportSource) -> &'static str {
    match source {
        ReportSource::User => "by a user",
        ReportSource::Operator => "by the operator",
        ReportSource::Audit => "by the audit",
        ReportSource::Release => "by a release",
    }
}

fn status_words(status: ReportStatus) -> &'static str {
    match status {
        ReportStatus::Matched => "counted as evidence",
        ReportStatus::UnknownVerdict => {
            "NOT counted: no verdict with this id is in the journal (never made here, or purged)"
        }
        ReportStatus::DomainMismatch => "NOT counted: the verdict has no recipient in this domain",
        ReportStatus::NoReporterDomain => "NOT counted: the report names no domain",
    }
}

fn refused(refusal: &Refusal) -> Response {
    Response::text(403, &format!("{refusal}\n"))
}

fn failed(context: &Context, error: &str, back: Option<&str>) -> Response {
    Response::html(
        500,
        render::message(context, "the store could not be read", error, back),
    )
}

fn action_failed(context: &Context, error: &ActionError, back: Option<&str>) -> Response {
    let code = match error {
        ActionError::ReleaseUnavailable => 503,
        ActionError::NotHeld(_) => 404,
        ActionError::InProgress(_) | ActionError::AlreadyReleased(_) => 409,
        ActionError::Undelivered(..) => 502,
        ActionError::Store(_) | ActionError::Unrecorded(..) => 500,
    };
    Response::html(
        code,
        render::message(context, "not done", &error.to_string(), back),
    )
}
