! A linear-Gaussian 4D-Var-style problem served to varpost from Fortran: a minimal real example.
!
! Control vector x of even length n (default 10, or the first command-line argument).
! Background: xb(i) = cos(0.5 i), B = diag(sb(i)^2) with sb(i) = 0.5 + 0.05 i.
! Observations of pair averages: (H x)(j) = (x(2j-1) + x(2j)) / 2, j = 1..n/2,
!     y(j) = sin(j), R = so^2 I with so = 0.2.
! Cost: J(x) = 1/2 sum_i (x(i) - xb(i))^2 / sb(i)^2 + 1/2 sum_j ((H x)(j) - y(j))^2 / so^2,
! gradient and (exact, the problem being linear) Hessian-vector product by hand-written adjoint.
program pairs
  use iso_fortran_env, only: int64, real64, error_unit
  use varpost_adapter
  implicit none
  integer :: n, i, op, npay, stat
  integer(int64) :: id
  real(real64), allocatable :: xb(:), sb(:), y(:), buf(:), g(:)
  real(real64), parameter :: so = 0.2_real64
  character(len=32) :: arg
  logical :: ok

  n = 10
  if (command_argument_count() >= 1) then
    call get_command_argument(1, arg)
    read(arg, *, iostat=stat) n
    if (stat /= 0 .or. n < 2 .or. mod(n, 2) /= 0) then
      write(error_unit, '(a)') 'usage: pairs [n, even and >= 2]'
      stop 2
    end if
  end if
  allocate(xb(n), sb(n), y(n / 2), buf(2 * n), g(n))
  do i = 1, n
    xb(i) = cos(0.5_real64 * i)
    sb(i) = 0.5_real64 + 0.05_real64 * i
  end do
  do i = 1, n / 2
    y(i) = sin(real(i, real64))
  end do

  if (.not. vp_open()) stop 2
  if (.not. vp_hello(n, '["hess_vec","split","prior","prior_solve"]', &
                     'pair-average observations (Fortran example)')) stop 0

  do
    call vp_read_request(op, id, buf, npay, ok)
    if (.not. ok .or. op == OP_QUIT) exit
    select case (op)
    case (OP_COST_GRAD)
      call gradient(buf(1:n), g)
      call vp_reply(op, id, [jb(buf(1:n)) + jo(buf(1:n)), g])
    case (OP_COST)
      call vp_reply(op, id, [jb(buf(1:n)) + jo(buf(1:n))])
    case (OP_SPLIT)
      call vp_reply(op, id, [jb(buf(1:n)), jo(buf(1:n))])
    case (OP_HESS_VEC)
      call hessvec(buf(n + 1:2 * n), g)
      call vp_reply(op, id, g)
    case (OP_BACKGROUND)
      call vp_reply(op, id, [xb, sb**2, sum(2 * log(sb))])
    case (OP_B_HALF, OP_B_HALF_T)
      call vp_reply(op, id, sb * buf(1:n))
    case (OP_B_HALF_SOLVE, OP_B_HALF_T_SOLVE)
      call vp_reply(op, id, buf(1:n) / sb)
    case default
      call vp_reply_error(id, 'unknown request', .false.)
    end select
  end do

contains

  real(real64) function jb(x)
    real(real64), intent(in) :: x(:)
    jb = 0.5_real64 * sum(((x - xb) / sb)**2)
  end function jb

  real(real64) function jo(x)
    real(real64), intent(in) :: x(:)
    jo = 0.5_real64 * sum(((0.5_real64 * (x(1:n:2) + x(2:n:2)) - y) / so)**2)
  end function jo

  subroutine gradient(x, grad)
    real(real64), intent(in) :: x(:)
    real(real64), intent(out) :: grad(:)
    real(real64) :: d(n / 2)
    d = (0.5_real64 * (x(1:n:2) + x(2:n:2)) - y) / so**2
    grad = (x - xb) / sb**2
    grad(1:n:2) = grad(1:n:2) + 0.5_real64 * d
    grad(2:n:2) = grad(2:n:2) + 0.5_real64 * d
  end subroutine gradient

  subroutine hessvec(v, hv)
    real(real64), intent(in) :: v(:)
    real(real64), intent(out) :: hv(:)
    real(real64) :: d(n / 2)
    d = 0.5_real64 * (v(1:n:2) + v(2:n:2)) / so**2
    hv = v / sb**2
    hv(1:n:2) = hv(1:n:2) + 0.5_real64 * d
    hv(2:n:2) = hv(2:n:2) + 0.5_real64 * d
  end subroutine hessvec

end program pairs
