# A wxshock server, the HTTP exchanges with it, and its problem documents as R conditions.

#' @export
wxshock_server <- function(url = Sys.getenv("WXSHOCK_SERVER", "http://127.0.0.1:8000"),
                           token = Sys.getenv("WXSHOCK_TOKEN"), timeout = 300,
                           on_demand_limit = 200) {
  if (!is.character(url) || length(url) != 1L || !grepl("^https?://", url)) {
    stop("wxshock_server(): url must be one string starting with http:// or https://, got ",
         deparse(url), call. = FALSE)
  }
  structure(
    list(url = sub("/+$", "", url), token = if (nzchar(token)) token else NULL,
         timeout = timeout, on_demand_limit = on_demand_limit),
    class = "wxshock_server"
  )
}

#' @export
print.wxshock_server <- function(x, ...) {
  cat("<wxshock server ", x$url, if (!is.null(x$token)) " (with a token)", ">\n", sep = "")
  invisible(x)
}

# The server's problem document (RFC 9457) as an R error condition of class "wxshock_problem", with the
# document's fields (status, type, title, detail, pointer, feature_id, errors) and the whole document.
problem_condition <- function(problem, status, call = NULL) {
  field <- function(name) if (is.null(problem[[name]])) NULL else problem[[name]]
  detail <- field("detail") %||% field("title") %||% paste("HTTP", status)
  where <- if (!is.null(field("pointer"))) paste0(" [at ", field("pointer"), "]") else ""
  message <- sprintf("wxshock server refused the request (HTTP %s %s): %s%s",
                     status, field("title") %||% "", detail, where)
  slug <- sub(".*/", "", field("type") %||% "")
  structure(
    class = c(if (nzchar(slug)) paste0("wxshock_problem_", gsub("-", "_", slug)), "wxshock_problem",
              "error", "condition"),
    list(message = message, call = call, status = as.integer(status), type = field("type"),
         title = field("title"), detail = detail, pointer = field("pointer"),
         feature_id = field("feature_id"), errors = field("errors"), problem = problem)
  )
}

`%||%` <- function(a, b) if (is.null(a)) b else a

# One exchange with the server: retried on 429/503 (httr2's transient statuses); an answer of 400 or more
# raises its problem document.
server_request <- function(server, method, path, body_json = NULL, query = list(), accept = NULL,
                           headers = list()) {
  req <- httr2::request(server$url)
  req <- httr2::req_url_path_append(req, paste(path, collapse = "/"))
  if (length(query)) req <- do.call(httr2::req_url_query, c(list(req), query))
  req <- httr2::req_method(req, method)
  req <- httr2::req_user_agent(req, paste0("wxshock-r/", utils::packageVersion("wxshock")))
  if (!is.null(accept)) req <- httr2::req_headers(req, Accept = accept)
  if (length(headers)) req <- do.call(httr2::req_headers, c(list(req), headers))
  if (!is.null(server$token)) req <- httr2::req_auth_bearer_token(req, server$token)
  if (!is.null(body_json)) req <- httr2::req_body_raw(req, body_json, type = "application/json")
  req <- httr2::req_timeout(req, server$timeout)
  req <- httr2::req_retry(req, max_tries = 3)
  req <- httr2::req_error(req, is_error = function(resp) FALSE)
  resp <- httr2::req_perform(req)
  status <- httr2::resp_status(resp)
  if (status >= 400) {
    problem <- tryCatch(
      jsonlite::fromJSON(httr2::resp_body_string(resp), simplifyVector = FALSE),
      error = function(e) list(title = httr2::resp_status_desc(resp),
                               detail = substr(httr2::resp_body_string(resp), 1, 500))
    )
    if (!is.list(problem)) problem <- list(detail = as.character(problem))
    stop(problem_condition(problem, status, call = sys.call(-1)))
  }
  resp
}

# A JSON answer as nested lists.
server_json <- function(server, path, ...) {
  resp <- server_request(server, "GET", path, accept = "application/json", ...)
  jsonlite::fromJSON(httr2::resp_body_string(resp), simplifyVector = FALSE)
}

#' @export
served_datasets <- function(server) {
  datasets <- server_json(server, c("v1", "datasets"))$datasets
  data.frame(
    name = vapply(datasets, function(d) as.character(d$name), ""),
    fingerprint = vapply(datasets, function(d) as.character(d$fingerprint %||% NA), ""),
    stringsAsFactors = FALSE
  )
}

#' @export
indicator_catalog <- function(server) {
  entries <- server_json(server, c("v1", "indicators"))$indicators
  text <- function(e, key) as.character(e[[key]] %||% NA)
  data.frame(
    name = vapply(entries, text, "", key = "name"),
    unit = vapply(entries, text, "", key = "unit"),
    family = vapply(entries, text, "", key = "family"),
    definition = vapply(entries, text, "", key = "definition"),
    source = vapply(entries, text, "", key = "source"),
    stringsAsFactors = FALSE
  )
}
