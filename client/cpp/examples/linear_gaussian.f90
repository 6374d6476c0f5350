! linear_gaussian: a Fortran program that runs a sluice session through the
! C interface (module sluice, iso_c_binding).
!
! Scenario, invented: the calibration of a strain-gauge load cell. The
! bridge output v (mV) is modelled as v = b0 + b1 * load (kN) +
! b2 * (temperature - 20 C) + noise, noise sd 0.02 mV, with priors
! b ~ N(0, 10^2 I). The posterior of b = (b0, b1, b2) is Gaussian with
! precision P = X'X / s^2 + I / 100 and mean P^-1 X'v / s^2 (the normal
! equations), which the program solves to compare with the draws.
!
! Kernel "ozaki" asks the gradient and the Hessian of log pi at each point;
! it is exact for Gaussian targets. The program checks:
!   * every kept draw arrives (draws callback: count = chains x draws), and
!     the mean of the draws it received equals the server's summary mean;
!   * each posterior mean lies within 5 Monte Carlo standard errors of the
!     closed-form mean (MCSE = sd / sqrt(bulk-ESS), the server's final
!     bulk-ESS; 5 standard errors is a two-sided normal tail of ~6e-7);
!   * a second handle following the finished session (sluice_session_follow
!     with the session's own token, sluice_session_token) receives the same
!     draws in order, their sums equal bit for bit.
! It prints "check passed" and exits 0, or "check FAILED" and stops with
! code 1.
!
!   linear_gaussian HOST:PORT [TOKEN_FILE [CA_FILE]]
!
! TOKEN_FILE: send the bearer token it holds (a server with --token-file);
! CA_FILE: connect with TLS, trusting the authorities it holds.
module load_cell
  use, intrinsic :: iso_c_binding
  use sluice
  implicit none

  integer, parameter :: n_obs = 24, n_par = 3
  real(c_double), parameter :: noise_sd = 0.02d0, prior_sd = 10d0

  ! The data and the running sums of the draws, reached through user_data.
  type :: model_t
    real(c_double) :: x(n_obs, n_par), v(n_obs)
    real(c_double) :: precision(n_par, n_par)
    integer(c_int64_t) :: draws_seen = 0, next_seq = 0, progress_reports = 0
    real(c_double) :: draw_sum(n_par) = 0
    logical :: seq_ok = .true.
  end type model_t

contains

  ! Invented readings: loads 0..11 kN at two temperatures, true
  ! b = (0.15, 2.04, -0.013), noise from a fixed-seed generator.
  subroutine make_data(m)
    type(model_t), intent(inout) :: m
    integer :: i
    integer(c_int64_t) :: state
    real(c_double) :: load, temp, u1, u2, z
    state = 20261202_c_int64_t
    do i = 1, n_obs
      load = real(mod(i - 1, 12), c_double)
      temp = merge(15d0, 31d0, i <= 12)
      u1 = next_uniform(state)
      u2 = next_uniform(state)
      z = sqrt(-2d0 * log(u1)) * cos(6.283185307179586d0 * u2)
      m%x(i, :) = [1d0, load, temp - 20d0]
      m%v(i) = 0.15d0 + 2.04d0 * load - 0.013d0 * (temp - 20d0) + noise_sd * z
    end do
    m%precision = matmul(transpose(m%x), m%x) / noise_sd**2
    do i = 1, n_par
      m%precision(i, i) = m%precision(i, i) + 1d0 / prior_sd**2
    end do
  end subroutine make_data

  ! The Park-Miller minimal standard generator (multiplier 16807, modulus
  ! 2^31 - 1), in (0, 1); no overflow in 64-bit integers.
  function next_uniform(state) result(u)
    integer(c_int64_t), intent(inout) :: state
    real(c_double) :: u
    state = mod(16807_c_int64_t * state, 2147483647_c_int64_t)
    u = real(state, c_double) / 2147483647d0
  end function next_uniform

  ! The exact posterior mean: solve P mean = X'v / s^2 by Gaussian
  ! elimination with partial pivoting.
  function exact_mean(m) result(mean)
    type(model_t), intent(in) :: m
    real(c_double) :: mean(n_par), a(n_par, n_par), b(n_par), t(n_par), tb, f
    integer :: i, j, p
    a = m%precision
    b = matmul(transpose(m%x), m%v) / noise_sd**2
    do i = 1, n_par
      p = i - 1 + maxloc(abs(a(i:, i)), dim=1)
      t = a(i, :); a(i, :) = a(p, :); a(p, :) = t
      tb = b(i); b(i) = b(p); b(p) = tb
      do j = i + 1, n_par
        f = a(j, i) / a(i, i)
        a(j, :) = a(j, :) - f * a(i, :)
        b(j) = b(j) - f * b(i)
      end do
    end do
    do i = n_par, 1, -1
      mean(i) = (b(i) - dot_product(a(i, i + 1:), mean(i + 1:))) / a(i, i)
    end do
  end function exact_mean

  ! The evaluation callback: gradient and Hessian of log pi at each row.
  integer(c_int) function evaluate(batch, user) bind(c)
    type(sluice_batch), intent(in) :: batch
    type(c_ptr), value :: user
    type(model_t), pointer :: m
    real(c_double), pointer :: b(:, :), g(:, :), h(:, :, :), lp(:)
    integer :: r
    call c_f_pointer(user, m)
    call c_f_pointer(batch%points, b, [batch%dim, batch%rows])
    if (batch%dim /= n_par .or. batch%replicates /= 1) then
      evaluate = 1
      return
    end if
    if (batch%want_gradient /= 0) then
      call c_f_pointer(batch%gradients, g, [batch%dim, batch%rows])
      do r = 1, batch%rows
        g(:, r) = matmul(transpose(m%x), m%v - matmul(m%x, b(:, r))) / noise_sd**2 - b(:, r) / prior_sd**2
      end do
    end if
    if (batch%want_hessian /= 0) then
      call c_f_pointer(batch%hessians, h, [batch%dim, batch%dim, batch%rows])
      do r = 1, batch%rows
        h(:, :, r) = -m%precision
      end do
    end if
    if (batch%want_log_density /= 0) then
      call c_f_pointer(batch%log_densities, lp, [batch%rows])
      do r = 1, batch%rows
        lp(r) = -0.5d0 * sum((m%v - matmul(m%x, b(:, r)))**2) / noise_sd**2 - 0.5d0 * sum(b(:, r)**2) / prior_sd**2
      end do
    end if
    evaluate = 0
  end function evaluate

  subroutine on_draws(d, user) bind(c)
    type(sluice_draws), intent(in) :: d
    type(c_ptr), value :: user
    type(model_t), pointer :: m
    real(c_double), pointer :: vals(:, :)
    integer :: r
    call c_f_pointer(user, m)
    if (d%seq /= m%next_seq) m%seq_ok = .false.
    m%next_seq = d%seq + d%rows
    call c_f_pointer(d%values, vals, [d%dim, d%rows])
    do r = 1, d%rows
      m%draw_sum = m%draw_sum + vals(:, r)
    end do
    m%draws_seen = m%draws_seen + d%rows
  end subroutine on_draws

  subroutine on_progress(p, user) bind(c)
    type(sluice_progress), intent(in) :: p
    type(c_ptr), value :: user
    type(model_t), pointer :: m
    call c_f_pointer(user, m)
    if (p%steps > 0 .and. p%evaluations_used > 0) m%progress_reports = m%progress_reports + 1
  end subroutine on_progress

end module load_cell

program linear_gaussian
  use, intrinsic :: iso_c_binding
  use sluice
  use load_cell
  implicit none

  integer(c_int32_t), parameter :: chains = 8
  integer(c_int64_t), parameter :: draws = 1000
  type(model_t), target :: model, follower
  type(sluice_spec) :: spec
  type(sluice_summary) :: summary
  real(c_double), target :: start(n_par) = 0d0
  character(kind=c_char, len=16), target :: kernel
  character(kind=c_char, len=64), target :: names
  character(len=256) :: target, token_file, ca_file
  character(len=:), allocatable :: layout_message
  type(c_ptr) :: s, f
  integer(c_int) :: rc
  character(len=:), allocatable :: session_id, session_token
  real(c_double), pointer :: mean(:), sd(:), ess(:)
  real(c_double) :: exact(n_par), z, mcse, own_mean
  logical :: ok
  integer :: j
  character(len=2), parameter :: labels(n_par) = ["b0", "b1", "b2"]

  if (command_argument_count() < 1 .or. command_argument_count() > 3) then
    write (*, '(a)') "usage: linear_gaussian HOST:PORT [TOKEN_FILE [CA_FILE]]"
    stop 2
  end if
  call get_command_argument(1, target)
  token_file = ""
  ca_file = ""
  if (command_argument_count() >= 2) call get_command_argument(2, token_file)
  if (command_argument_count() >= 3) call get_command_argument(3, ca_file)
  if (.not. sluice_layout_ok(layout_message)) then
    write (*, '(a, a)') "linear_gaussian: the Fortran types do not match the library: ", layout_message
    stop 1
  end if
  call make_data(model)

  kernel = "ozaki" // c_null_char
  names = "offset_mV,gain_mV_per_kN,temp_mV_per_C" // c_null_char
  call sluice_spec_defaults(spec)
  spec%dim = n_par
  spec%chains = chains
  spec%start = c_loc(start)
  spec%start_rows = 1
  spec%kernel = c_loc(kernel)
  spec%names = c_loc(names)
  spec%step = 1d0
  spec%burn_in = 50
  spec%draws_per_chain = draws
  spec%seed = 23
  spec%max_message_bytes = 1048576
  spec%progress_every_steps = 200

  s = sluice_session_new(spec, c_funloc(evaluate), c_loc(model))
  if (.not. c_associated(s)) error stop "linear_gaussian: sluice_session_new failed"
  call sluice_session_on_draws(s, c_funloc(on_draws), c_loc(model))
  call sluice_session_on_progress(s, c_funloc(on_progress), c_loc(model))
  if (len_trim(token_file) > 0) rc = sluice_session_set_token_file(s, trim(token_file) // c_null_char)
  if (len_trim(ca_file) > 0) rc = sluice_session_set_tls(s, trim(ca_file) // c_null_char, c_null_char, c_null_char)
  rc = sluice_session_run(s, trim(target) // c_null_char)
  if (rc /= SLUICE_OK) then
    write (*, '(a, a, a, a, a, a)') "session failed: ", sluice_string(sluice_error_name(rc)), ": ", &
      sluice_string(sluice_session_error_message(s)), " field ", sluice_string(sluice_session_error_field(s))
    call sluice_session_free(s)
    stop 1
  end if
  rc = sluice_session_summary(s, summary)
  if (rc /= SLUICE_OK) error stop "linear_gaussian: no summary"

  write (*, '(a, a, a, i0, a, i0, a)') "reason: ", sluice_string(sluice_reason_name(summary%reason)), ", ", &
    summary%draws_received, " draws, ", model%progress_reports, " progress reports"
  ok = summary%reason == SLUICE_REASON_DRAWS_COLLECTED .and. summary%dim == n_par .and. &
       summary%draws_received == chains * draws .and. model%draws_seen == chains * draws .and. &
       model%seq_ok .and. summary%progress%n_parameters == n_par .and. model%progress_reports > 0
  if (.not. ok) then
    write (*, '(a)') "check: unexpected summary (reason, counts, sequence or diagnostics)"
  else
    call c_f_pointer(summary%mean, mean, [n_par])
    call c_f_pointer(summary%sd, sd, [n_par])
    call c_f_pointer(summary%progress%bulk_ess, ess, [n_par])
    exact = exact_mean(model)
    write (*, '(a10, 4a14, a10)') "parameter", "mean", "exact mean", "sd", "draws' mean", "bulk ESS"
    do j = 1, n_par
      own_mean = model%draw_sum(j) / real(model%draws_seen, c_double)
      mcse = sd(j) / sqrt(ess(j))
      z = (mean(j) - exact(j)) / mcse
      write (*, '(a10, 4f14.6, f10.0)') labels(j), mean(j), exact(j), sd(j), own_mean, ess(j)
      write (*, '(a, i0, a, f6.2, a, es10.3)') "check b", j - 1, ": |mean - exact| / MCSE = ", abs(z), ", MCSE ", mcse
      ! The server's mean and the mean of the draws received: the same
      ! numbers summed in another order, so equal to rounding.
      if (abs(own_mean - mean(j)) > 1d-9 * max(1d0, abs(mean(j)))) then
        write (*, '(a, i0)') "check: draws' mean differs from the summary mean for b", j - 1
        ok = .false.
      end if
      if (.not. (ess(j) > 0d0 .and. abs(z) <= 5d0)) ok = .false.
    end do
  end if

  ! Follow the finished session from a second handle: the server's bearer
  ! token as for the session, and the session's own token. (A follower's
  ! spec and evaluation callback are not used.)
  session_id = sluice_string(sluice_session_id(s))
  session_token = sluice_string(sluice_session_token(s))
  f = sluice_session_new(spec, c_null_funptr, c_null_ptr)
  if (.not. c_associated(f)) error stop "linear_gaussian: sluice_session_new failed"
  call sluice_session_on_draws(f, c_funloc(on_draws), c_loc(follower))
  if (len_trim(token_file) > 0) rc = sluice_session_set_token_file(f, trim(token_file) // c_null_char)
  if (len_trim(ca_file) > 0) rc = sluice_session_set_tls(f, trim(ca_file) // c_null_char, c_null_char, c_null_char)
  rc = sluice_session_follow(f, trim(target) // c_null_char, session_id // c_null_char, &
                             session_token // c_null_char, 0_c_int64_t)
  write (*, '(a, a, a, i0, a)') "follow: ", sluice_string(sluice_error_name(rc)), ", ", follower%draws_seen, " draws"
  if (rc /= SLUICE_OK .or. len(session_token) /= 32 .or. follower%draws_seen /= model%draws_seen .or. &
      .not. follower%seq_ok .or. any(follower%draw_sum /= model%draw_sum)) then
    write (*, '(a, a)') "check: the follower did not receive the session's draws: ", &
      sluice_string(sluice_session_error_message(f))
    ok = .false.
  end if
  call sluice_session_free(f)
  call sluice_session_free(s)
  if (ok) then
    write (*, '(a)') "check passed"
  else
    write (*, '(a)') "check FAILED"
    stop 1
  end if
end program linear_gaussian
