! A small Fortran helper for the varpost adapter protocol, version 1 (see ../PROTOCOL.md), binary
! encoding only: stdin and stdout are opened as unformatted streams, frames are read and written as raw
! little-endian integers and doubles. Diagnostics go to error_unit (stderr): stdout carries the protocol.
module varpost_adapter
  use iso_fortran_env, only: int8, int16, int32, int64, real64, error_unit, iostat_end
  implicit none
  private
  public :: vp_open, vp_hello, vp_read_request, vp_reply, vp_reply_error
  public :: OP_COST_GRAD, OP_COST, OP_HESS_VEC, OP_SPLIT, OP_BACKGROUND, OP_B_HALF, OP_B_HALF_T, &
            OP_B_HALF_SOLVE, OP_B_HALF_T_SOLVE, OP_QUIT

  integer, parameter :: OP_COST_GRAD = 1, OP_COST = 2, OP_HESS_VEC = 3, OP_SPLIT = 4, &
                        OP_BACKGROUND = 5, OP_B_HALF = 6, OP_B_HALF_T = 7, OP_B_HALF_SOLVE = 8, &
                        OP_B_HALF_T_SOLVE = 9, OP_QUIT = 15
  integer, parameter :: TAG_REPLY = 128, TAG_ERROR = 255, HEADER = 16
  integer :: uin = -1, uout = -1

contains

  ! Opens stdin and stdout as byte streams. Returns .false. (and says why on stderr) on failure.
  logical function vp_open()
    integer :: ios
    vp_open = .false.
    open(newunit=uin, file='/dev/stdin', access='stream', form='unformatted', action='read', &
         status='old', iostat=ios)
    if (ios /= 0) then
      write(error_unit, '(a)') 'varpost_adapter: cannot open /dev/stdin as a stream'
      return
    end if
    open(newunit=uout, file='/dev/stdout', access='stream', form='unformatted', action='write', &
         status='old', iostat=ios)
    if (ios /= 0) then
      write(error_unit, '(a)') 'varpost_adapter: cannot open /dev/stdout as a stream'
      return
    end if
    vp_open = .true.
  end function vp_open

  ! Writes the hello line (offers: a JSON list such as '["hess_vec","split"]') and reads varpost's start
  ! line. Returns .false. if stdin closed or varpost did not choose the binary encoding.
  logical function vp_hello(dim, offers, label)
    integer, intent(in) :: dim
    character(len=*), intent(in) :: offers, label
    character(len=20) :: dimstr
    character(len=1) :: ch
    character(len=256) :: line
    integer :: ios, k
    write(dimstr, '(i0)') dim
    write(uout) '{"hello":"varpost-adapter","protocol":1,"dim":' // trim(dimstr) // &
      ',"encodings":["binary"],"offers":' // offers // ',"label":"' // label // '"}' // achar(10)
    flush(uout)
    line = ''
    k = 0
    vp_hello = .false.
    do
      read(uin, iostat=ios) ch
      if (ios /= 0) return
      if (ch == achar(10)) exit
      k = k + 1
      if (k <= len(line)) line(k:k) = ch
    end do
    if (index(line, '"binary"') == 0) then
      write(error_unit, '(a)') 'varpost_adapter: varpost did not choose the binary encoding: ' // trim(line)
      return
    end if
    vp_hello = .true.
  end function vp_hello

  ! Reads one request: its op, id and payload (npay doubles into buf). ok is .false. at end of input or
  ! on a frame that does not fit buf.
  subroutine vp_read_request(op, id, buf, npay, ok)
    integer, intent(out) :: op, npay
    integer(int64), intent(out) :: id
    real(real64), intent(inout) :: buf(:)
    logical, intent(out) :: ok
    integer(int32) :: body
    integer(int8) :: tag, flags
    integer(int16) :: reserved
    integer :: ios
    ok = .false.
    op = 0
    npay = 0
    id = 0
    read(uin, iostat=ios) body, tag, flags, reserved, id
    if (ios /= 0) return
    op = iand(int(tag), 255)
    npay = (int(body) - (HEADER - 4)) / 8
    if (npay < 0 .or. npay > size(buf) .or. mod(int(body) - (HEADER - 4), 8) /= 0) then
      write(error_unit, '(a,i0)') 'varpost_adapter: unexpected frame body length ', body
      return
    end if
    if (npay > 0) then
      read(uin, iostat=ios) buf(1:npay)
      if (ios /= 0) return
    end if
    ok = .true.
  end subroutine vp_read_request

  ! Writes a reply to request `op` with the given values (cost and gradient, a vector, ...).
  subroutine vp_reply(op, id, values)
    integer, intent(in) :: op
    integer(int64), intent(in) :: id
    real(real64), intent(in) :: values(:)
    write(uout) int(HEADER - 4 + 8 * size(values), int32), int(ior(TAG_REPLY, op) - 256, int8), &
                0_int8, 0_int16, id, values
    flush(uout)
  end subroutine vp_reply

  ! Writes an error reply; recoverable: another point may succeed.
  subroutine vp_reply_error(id, message, recoverable)
    integer(int64), intent(in) :: id
    character(len=*), intent(in) :: message
    logical, intent(in) :: recoverable
    integer(int8) :: flags
    flags = 0_int8
    if (recoverable) flags = 1_int8
    write(uout) int(HEADER - 4 + len(message), int32), -1_int8, flags, 0_int16, id, message
    flush(uout)
  end subroutine vp_reply_error

end module varpost_adapter
