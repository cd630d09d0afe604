# Batch jobs: submit, follow with a progress bar, fetch the result, cancel.

new_job <- function(server, status) {
  structure(list(server = server, id = status$id, status = status), class = "wxshock_job")
}

submit_body <- function(server, body, count) {
  key <- paste0("r-", paste(sample(c(letters, 0:9), 24, replace = TRUE), collapse = ""))
  resp <- server_request(server, "POST", c("v1", "jobs"), body_json = body,
                         query = list(format = "json"), accept = "application/json",
                         headers = list(`Idempotency-Key` = key))
  new_job(server, jsonlite::fromJSON(httr2::resp_body_string(resp), simplifyVector = FALSE))
}

#' @export
submit_shocks <- function(server, features, ..., id_column = NULL) {
  stopifnot(inherits(server, "wxshock_server"))
  communities <- geojson_features(features, id_column)
  submit_body(server, request_body(communities, request_fields(...)), communities$count)
}

#' @export
print.wxshock_job <- function(x, ...) {
  s <- x$status
  cat(sprintf("<wxshock job %s: %s, %s of %s features>\n", x$id, s$state, s$features_done %||% 0,
              s$features_total %||% "?"))
  invisible(x)
}

#' @export
job_status <- function(job) {
  job$status <- server_json(job$server, c("v1", "jobs", job$id))
  job
}

#' @export
wait_for_job <- function(job, progress = interactive(), poll = 0.5, timeout = Inf) {
  started <- Sys.time()
  bar <- NULL
  repeat {
    job <- job_status(job)
    s <- job$status
    total <- as.numeric(s$features_total %||% 0)
    if (isTRUE(progress) && total > 0) {
      if (is.null(bar)) bar <- utils::txtProgressBar(min = 0, max = total, style = 3, file = stderr())
      utils::setTxtProgressBar(bar, as.numeric(s$features_done %||% 0))
    }
    if (s$state %in% c("succeeded", "failed", "cancelled")) break
    if (as.numeric(difftime(Sys.time(), started, units = "secs")) > timeout) {
      if (!is.null(bar)) close(bar)
      stop(sprintf("job %s still %s after %s s (%s of %s features); it keeps running on the server: call wait_for_job() again",
                   job$id, s$state, timeout, s$features_done, s$features_total), call. = FALSE)
    }
    Sys.sleep(poll)
  }
  if (!is.null(bar)) close(bar)
  if (!identical(s$state, "succeeded")) {
    problem <- s$error %||% list(title = paste("Job", s$state), detail = paste("job", job$id, "was", s$state))
    stop(problem_condition(problem, problem$status %||% 409L))
  }
  job
}

#' @export
job_result <- function(job) {
  resp <- server_request(job$server, "GET", c("v1", "jobs", job$id, "result"))
  kind <- sub(";.*", "", httr2::resp_header(resp, "content-type") %||% "")
  if (!identical(kind, "application/json")) {
    stop("job ", job$id, " was submitted for ", kind, "; job_result() reads JSON results (submit with this package)",
         call. = FALSE)
  }
  result_frame(httr2::resp_body_string(resp))
}

#' @export
cancel_job <- function(job) {
  server_request(job$server, "DELETE", c("v1", "jobs", job$id))
  job_status(job)
}
