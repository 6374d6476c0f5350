! sluice.f90: Fortran 2008 binding (iso_c_binding) of the sluice C interface,
! sluice.h. The derived types mirror the C structs field by field; the
! interfaces call the C functions directly. Arrays cross as type(c_ptr):
! give c_loc(x) of a target array, and in the evaluation callback map the
! batch's pointers with c_f_pointer, shape [dim, rows] (column r is row r of
! the row-major C array):
!
!   call c_f_pointer(batch%points, x, [batch%dim, batch%rows])
!   call c_f_pointer(batch%gradients, g, [batch%dim, batch%rows])
!
! Strings passed to C end with c_null_char; sluice_string turns a C string
! returned by the library into a Fortran one.
module sluice
  use, intrinsic :: iso_c_binding
  implicit none
  private

  ! sluice_code
  integer(c_int), parameter, public :: SLUICE_OK = 0, SLUICE_ERR_INVALID_ARGUMENT = 1, &
    SLUICE_ERR_RESOURCE_EXHAUSTED = 2, SLUICE_ERR_DEADLINE_EXCEEDED = 3, SLUICE_ERR_UNAVAILABLE = 4, &
    SLUICE_ERR_CANCELLED = 5, SLUICE_ERR_SERVER = 6, SLUICE_ERR_EVALUATOR = 7, SLUICE_ERR_PROTOCOL = 8, &
    SLUICE_ERR_USAGE = 9, SLUICE_ERR_STATE = 10, SLUICE_ERR_UNAUTHENTICATED = 11
  ! sluice_reason
  integer(c_int32_t), parameter, public :: SLUICE_REASON_NONE = 0, SLUICE_REASON_BUDGET_SPENT = 1, &
    SLUICE_REASON_TIME_SPENT = 2, SLUICE_REASON_STOPPED = 3, SLUICE_REASON_DRAWS_COLLECTED = 4, &
    SLUICE_REASON_FAILED = 5, SLUICE_REASON_SHUTDOWN = 6, SLUICE_REASON_TARGET_MET = 7

  type, bind(c), public :: sluice_spec
    integer(c_int32_t) :: dim, chains
    type(c_ptr) :: start
    integer(c_int32_t) :: start_rows, curvature_declared
    type(c_ptr) :: kernel, names
    real(c_double) :: step
    integer(c_int64_t) :: burn_in, keep_every, draws_per_chain, max_evaluations
    real(c_double) :: max_seconds
    integer(c_int64_t) :: progress_every_steps
    real(c_double) :: progress_interval_seconds
    integer(c_int64_t) :: seed ! uint64_t in C
    integer(c_int64_t) :: max_message_bytes
    real(c_double) :: strong_convexity, smoothness, start_distance, second_moment
    real(c_double) :: want_min_bulk_ess, want_min_tail_ess, want_max_rhat, want_max_ksd, want_eps
    integer(c_int32_t) :: want_metric, krylov_max_iterations
    real(c_double) :: friction, inverse_mass, krylov_tolerance, slice_width
    integer(c_int32_t) :: slice_max_expansions, curvature_probe_iterations
    integer(c_int32_t) :: noise_declared, noise_replicates
    real(c_double) :: noise_variance, noise_bias
    integer(c_int64_t) :: noise_data_size, noise_minibatch_size
    integer(c_int32_t) :: schedule_declared, anchor_every
    real(c_double) :: schedule_a, schedule_b, schedule_gamma, fixed_point_tolerance
    integer(c_int32_t) :: fixed_point_iterations, envelope_declared
    type(c_ptr) :: envelope_mean
    real(c_double) :: envelope_scale, envelope_log_bound
  end type sluice_spec

  type, bind(c), public :: sluice_batch
    integer(c_int32_t) :: rows, dim
    integer(c_int32_t) :: want_gradient, want_log_density, want_hessian, want_hessian_vector
    integer(c_int32_t) :: replicates, full_data
    type(c_ptr) :: points, chains, groups, vectors
    type(c_ptr) :: gradients, log_densities, hessians, hessian_vectors
  end type sluice_batch

  type, bind(c), public :: sluice_draws
    integer(c_int64_t) :: seq ! uint64_t in C
    integer(c_int32_t) :: rows, dim
    type(c_ptr) :: values, chains, iterations
  end type sluice_draws

  type, bind(c), public :: sluice_progress
    integer(c_int32_t) :: state, n_parameters
    integer(c_int64_t) :: steps, evaluations_used, evaluations_left, draws_sent
    real(c_double) :: seconds_used, seconds_left, evaluations_per_second, ksd
    integer(c_int32_t) :: has_bound, bound_guaranteed
    real(c_double) :: bound_value
    type(c_ptr) :: mean, sd, rhat, bulk_ess, tail_ess, mcse_mean
  end type sluice_progress

  type, bind(c), public :: sluice_summary
    integer(c_int32_t) :: reason, dim
    integer(c_int64_t) :: draws_received
    integer(c_int64_t) :: seed ! uint64_t in C
    real(c_double) :: step
    type(c_ptr) :: mean, sd, count
    type(sluice_progress) :: progress
  end type sluice_summary

  public :: sluice_spec_defaults, sluice_session_new, sluice_session_on_draws, sluice_session_on_progress, &
    sluice_session_run, sluice_session_summary, sluice_session_error_message, sluice_session_error_field, &
    sluice_session_error_description, sluice_session_grpc_code, sluice_session_free, sluice_error_name, &
    sluice_reason_name, sluice_string, sluice_layout_ok, sluice_session_set_tls, sluice_session_set_token, &
    sluice_session_set_token_file, sluice_session_set_insecure, sluice_session_follow, sluice_session_next_seq, &
    sluice_session_id, sluice_session_token, sluice_session_resume, sluice_session_set_resume, &
    sluice_session_resumes

  interface
    subroutine sluice_spec_defaults(spec) bind(c, name="sluice_spec_defaults")
      import :: sluice_spec
      type(sluice_spec), intent(out) :: spec
    end subroutine sluice_spec_defaults

    ! evaluate: integer(c_int) function f(batch, user_data) bind(c), with
    ! type(sluice_batch), intent(in) :: batch and type(c_ptr), value :: user_data.
    type(c_ptr) function sluice_session_new(spec, evaluate, user_data) bind(c, name="sluice_session_new")
      import :: c_ptr, c_funptr, sluice_spec
      type(sluice_spec), intent(in) :: spec
      type(c_funptr), value :: evaluate
      type(c_ptr), value :: user_data
    end function sluice_session_new

    subroutine sluice_session_on_draws(s, fn, user_data) bind(c, name="sluice_session_on_draws")
      import :: c_ptr, c_funptr
      type(c_ptr), value :: s
      type(c_funptr), value :: fn
      type(c_ptr), value :: user_data
    end subroutine sluice_session_on_draws

    subroutine sluice_session_on_progress(s, fn, user_data) bind(c, name="sluice_session_on_progress")
      import :: c_ptr, c_funptr
      type(c_ptr), value :: s
      type(c_funptr), value :: fn
      type(c_ptr), value :: user_data
    end subroutine sluice_session_on_progress

    ! Files and tokens end with c_null_char; pass c_null_char alone for
    ! "none" (ca_file: the system's roots; cert_file and key_file: no
    ! client certificate).
    integer(c_int) function sluice_session_set_tls(s, ca_file, cert_file, key_file) &
      bind(c, name="sluice_session_set_tls")
      import :: c_ptr, c_int, c_char
      type(c_ptr), value :: s
      character(kind=c_char), dimension(*), intent(in) :: ca_file, cert_file, key_file
    end function sluice_session_set_tls

    integer(c_int) function sluice_session_set_token(s, token) bind(c, name="sluice_session_set_token")
      import :: c_ptr, c_int, c_char
      type(c_ptr), value :: s
      character(kind=c_char), dimension(*), intent(in) :: token
    end function sluice_session_set_token

    integer(c_int) function sluice_session_set_token_file(s, path) bind(c, name="sluice_session_set_token_file")
      import :: c_ptr, c_int, c_char
      type(c_ptr), value :: s
      character(kind=c_char), dimension(*), intent(in) :: path
    end function sluice_session_set_token_file

    integer(c_int) function sluice_session_set_insecure(s, insecure) bind(c, name="sluice_session_set_insecure")
      import :: c_ptr, c_int
      type(c_ptr), value :: s
      integer(c_int), value :: insecure
    end function sluice_session_set_insecure

    ! Resuming by itself after a broken stream (on by default: 10 tries,
    ! waits from 0.1 s doubling to at most 5 s); attempts <= 0 turns it off.
    integer(c_int) function sluice_session_set_resume(s, attempts, first_wait_seconds, max_wait_seconds) &
        bind(c, name="sluice_session_set_resume")
      import :: c_ptr, c_int, c_double
      type(c_ptr), value :: s
      integer(c_int), value :: attempts
      real(c_double), value :: first_wait_seconds, max_wait_seconds
    end function sluice_session_set_resume

    integer(c_int) function sluice_session_resumes(s) bind(c, name="sluice_session_resumes")
      import :: c_ptr, c_int
      type(c_ptr), value :: s
    end function sluice_session_resumes

    integer(c_int) function sluice_session_run(s, target) bind(c, name="sluice_session_run")
      import :: c_ptr, c_int, c_char
      type(c_ptr), value :: s
      character(kind=c_char), dimension(*), intent(in) :: target
    end function sluice_session_run

    ! session_id and session_token (sluice_session_token of the session
    ! followed, not the server's bearer token) end with c_null_char;
    ! from_seq is uint64_t in C.
    integer(c_int) function sluice_session_follow(s, target, session_id, session_token, from_seq) &
      bind(c, name="sluice_session_follow")
      import :: c_ptr, c_int, c_char, c_int64_t
      type(c_ptr), value :: s
      character(kind=c_char), dimension(*), intent(in) :: target, session_id, session_token
      integer(c_int64_t), value :: from_seq
    end function sluice_session_follow

    ! As sluice_session_follow: strings end with c_null_char, next_seq is
    ! uint64_t in C.
    integer(c_int) function sluice_session_resume(s, target, session_id, session_token, next_seq) &
      bind(c, name="sluice_session_resume")
      import :: c_ptr, c_int, c_char, c_int64_t
      type(c_ptr), value :: s
      character(kind=c_char), dimension(*), intent(in) :: target, session_id, session_token
      integer(c_int64_t), value :: next_seq
    end function sluice_session_resume

    integer(c_int64_t) function sluice_session_next_seq(s) bind(c, name="sluice_session_next_seq")
      import :: c_ptr, c_int64_t
      type(c_ptr), value :: s
    end function sluice_session_next_seq

    type(c_ptr) function sluice_session_id(s) bind(c, name="sluice_session_id")
      import :: c_ptr
      type(c_ptr), value :: s
    end function sluice_session_id

    ! The session's own token (read it with sluice_string); not the
    ! server's bearer token.
    type(c_ptr) function sluice_session_token(s) bind(c, name="sluice_session_token")
      import :: c_ptr
      type(c_ptr), value :: s
    end function sluice_session_token

    integer(c_int) function sluice_session_summary(s, out) bind(c, name="sluice_session_summary")
      import :: c_ptr, c_int, sluice_summary
      type(c_ptr), value :: s
      type(sluice_summary), intent(out) :: out
    end function sluice_session_summary

    type(c_ptr) function sluice_session_error_message(s) bind(c, name="sluice_session_error_message")
      import :: c_ptr
      type(c_ptr), value :: s
    end function sluice_session_error_message

    type(c_ptr) function sluice_session_error_field(s) bind(c, name="sluice_session_error_field")
      import :: c_ptr
      type(c_ptr), value :: s
    end function sluice_session_error_field

    type(c_ptr) function sluice_session_error_description(s) bind(c, name="sluice_session_error_description")
      import :: c_ptr
      type(c_ptr), value :: s
    end function sluice_session_error_description

    integer(c_int) function sluice_session_grpc_code(s) bind(c, name="sluice_session_grpc_code")
      import :: c_ptr, c_int
      type(c_ptr), value :: s
    end function sluice_session_grpc_code

    subroutine sluice_session_free(s) bind(c, name="sluice_session_free")
      import :: c_ptr
      type(c_ptr), value :: s
    end subroutine sluice_session_free

    type(c_ptr) function sluice_error_name(code) bind(c, name="sluice_error_name")
      import :: c_ptr, c_int
      integer(c_int), value :: code
    end function sluice_error_name

    type(c_ptr) function sluice_reason_name(reason) bind(c, name="sluice_reason_name")
      import :: c_ptr, c_int
      integer(c_int), value :: reason
    end function sluice_reason_name

    integer(c_int) function sluice_check_layout(spec, batch, draws, progress, summary, message) &
      bind(c, name="sluice_check_layout")
      import :: c_int, c_int64_t, c_ptr
      integer(c_int64_t), value :: spec, batch, draws, progress, summary
      type(c_ptr), intent(out) :: message
    end function sluice_check_layout

    integer(c_size_t) function c_strlen(s) bind(c, name="strlen")
      import :: c_ptr, c_size_t
      type(c_ptr), value :: s
    end function c_strlen
  end interface

contains

  ! sluice_layout_ok checks that the types above have the sizes of the C
  ! structs the library was built with; on a mismatch it returns .false.
  ! and says which in message.
  logical function sluice_layout_ok(message)
    character(len=:), allocatable, intent(out) :: message
    type(sluice_spec) :: spec
    type(sluice_batch) :: batch
    type(sluice_draws) :: draws
    type(sluice_progress) :: progress
    type(sluice_summary) :: summary
    type(c_ptr) :: msg
    sluice_layout_ok = sluice_check_layout(int(c_sizeof(spec), c_int64_t), int(c_sizeof(batch), c_int64_t), &
      int(c_sizeof(draws), c_int64_t), int(c_sizeof(progress), c_int64_t), int(c_sizeof(summary), c_int64_t), &
      msg) == SLUICE_OK
    message = sluice_string(msg)
  end function sluice_layout_ok

  ! sluice_string copies a NUL-terminated C string into a Fortran string.
  function sluice_string(p) result(s)
    type(c_ptr), intent(in) :: p
    character(len=:), allocatable :: s
    character(kind=c_char), pointer :: chars(:)
    integer :: i, n
    if (.not. c_associated(p)) then
      s = ""
      return
    end if
    n = int(c_strlen(p))
    call c_f_pointer(p, chars, [n])
    allocate (character(len=n) :: s)
    do i = 1, n
      s(i:i) = chars(i)
    end do
  end function sluice_string

end module sluice
